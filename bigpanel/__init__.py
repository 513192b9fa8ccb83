"""bigpanel: within and first-difference panel regressions run as SQL over files."""

from .errors import BigpanelError, EstimationError, InputError
from .source import Engine, Source, open_source

__all__ = ["BigpanelError", "EstimationError", "InputError", "Engine", "Source", "open_source"]
__version__ = "0.1.0"

from .fit import FitList, fit, fit_many  # noqa: E402
from .results import FitResult  # noqa: E402

__all__ += ["fit", "fit_many", "FitList", "FitResult"]

from .panel import ColumnCheck, PanelReport, inspect_panel  # noqa: E402

__all__ += ["inspect_panel", "PanelReport", "ColumnCheck"]
