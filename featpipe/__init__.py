"""featpipe: engineered model terms as reviewed SQL, fitted and scored inside the engine."""

from .api import check, check_report, compute, connect, fit, refresh, render_sql
from .errors import Diagnostic, FeatpipeError
from .project import load_project

__version__ = "0.1.0"
__all__ = ["load_project", "check", "check_report", "connect", "compute", "fit", "refresh", "render_sql",
           "Diagnostic", "FeatpipeError"]
