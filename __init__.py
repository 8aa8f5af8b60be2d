"""swarmaudit: audit the particle dumps of block-structured particle simulations.

From Python (a notebook)::

    import swarmaudit as sa
    run = sa.open_run("runs/case7", domain=(0, 1, 0, 1), cells=(64, 64), blocks=(4, 4))
    run.census(); run.check(rtol=1e-3); run.view()

The API lives in ``swarmaudit.app.api`` and is loaded on first use, so
``import swarmaudit`` stays cheap (no plotting or dataframe stack until asked).
"""

__version__ = "0.1.0"

#: names served lazily from swarmaudit.app.api / swarmaudit.core.errors
_LAZY = {
    "open_run": ("app.api", "open_run"),
    "AuditedRun": ("app.api", "AuditedRun"),
    "CheckOutcome": ("app.api", "CheckOutcome"),
    "CompareOutcome": ("app.api", "CompareOutcome"),
    "InputError": ("core.errors", "InputError"),
    "OptionError": ("core.errors", "OptionError"),
    "SwarmAuditError": ("core.errors", "SwarmAuditError"),
}

__all__ = [*_LAZY, "__version__"]


def __getattr__(name):
    if name in _LAZY:
        from importlib import import_module
        module, attr = _LAZY[name]
        value = getattr(import_module(f"{__name__}.{module}"), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'swarmaudit' has no attribute '{name}'")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))
