"""bigpanel: within and first-difference panel regressions run as SQL over files.

The public names load on first use (PEP 562), so that ``import bigpanel`` and the
console entry start fast and can install their signal handlers before DuckDB, scipy
and pyarrow are imported.
"""

import sys as _sys
import types as _types

__version__ = "0.1.0"

_PUBLIC = {
    "BigpanelError": "errors", "EstimationError": "errors", "InputError": "errors",
    "Engine": "source", "Source": "source", "open_source": "source",
    "fit": "fit", "fit_many": "fit", "FitList": "fit", "FitResult": "results",
    "compare_results": "compare",
    "inspect_panel": "panel", "PanelReport": "panel", "ColumnCheck": "panel",
    "run_spec": "batch", "RunReport": "batch", "RunPlan": "batch", "SpecError": "batch",
}  # fmt: skip
__all__ = list(_PUBLIC)


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'bigpanel' has no attribute {name!r}")
    from importlib import import_module

    value = getattr(import_module(f"{__name__}.{module}"), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))


class _Package(_types.ModuleType):
    """Importing the submodule ``bigpanel.fit`` binds it as the package's attribute
    ``fit``; the public name is the function, so bind that instead."""

    def __setattr__(self, name: str, value: object) -> None:
        if name == "fit" and isinstance(value, _types.ModuleType):
            value = value.fit
        super().__setattr__(name, value)


_sys.modules[__name__].__class__ = _Package
