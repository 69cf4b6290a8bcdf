"""The dashboard: server-rendered pages with inline SVG charts (no script, no build)."""
