"""Help text without type artefacts: no `<bool>` beside a flag, no `{file}` in a usage line.

Typer 0.2x prints the Python type of every option (`--skip-bad <bool>`, `--help <bool>`) and
wraps required arguments in braces (`{file}`); neither tells a reader anything a flag or an
upper-case name does not. The two display hooks are replaced once, at import of the CLI.
"""

from __future__ import annotations

from typing import Any

from typer import core


def _option_type(self: Any, ctx: Any) -> str | None:
    """The value placeholder of an option; nothing for a flag, which takes no value."""
    if self.is_flag or self.count:
        return None
    return _typed(self, ctx)


def _argument_usage(self: Any) -> str:
    """FILE for a required argument, [FILE] for an optional one."""
    name = str(self.display_name_raw).upper()
    name = name if self.required else f"[{name}]"
    return name + ("..." if self.nargs != 1 else "")


_typed = core.TyperOption.display_type_rich


def install() -> None:
    """Replace the two display hooks (a second call changes nothing)."""
    core.TyperOption.display_type_rich = _option_type  # type: ignore[method-assign]
    core.TyperArgument._usage_display_name = _argument_usage  # type: ignore[method-assign]
