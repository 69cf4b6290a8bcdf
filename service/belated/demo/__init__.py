"""The furniture-shop demo: the scenario's orders (`shop`), what is loaded into the service
(`feed`), and the command that builds, serves and reports it (`serve`)."""

from belated.demo.serve import run

__all__ = ["run"]
