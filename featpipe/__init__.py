"""featpipe: engineered model terms as reviewed SQL, fitted and scored inside the engine."""

from .errors import Diagnostic, FeatpipeError

__version__ = "0.1.0"
__all__ = ["load_project", "check", "check_report", "connect", "compute", "fit", "refresh", "render_sql",
           "Diagnostic", "FeatpipeError"]


def __getattr__(name: str):
    """The API's functions load on first use (PEP 562): importing the command line or one stage loads no more."""
    if name in __all__:
        from . import api

        return getattr(api, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
