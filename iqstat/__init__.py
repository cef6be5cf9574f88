"""iqstat: Eb/N0, error rate and margin of noncoherent FSK/OOK links from IQ captures.

Notebook use::

    import iqstat
    cap = iqstat.open_capture("site7.sigmf-meta")
    report = iqstat.measure_capture(cap, iqstat.load_profile("link.toml"))
    report.summary.ebn0_db, report.summary.margin_db

or in one call, ``iqstat.measure_file("site7.sigmf-meta", profile="link.toml")``.

The public names are imported on first use (PEP 562), so that ``import iqstat`` and the
command line start quickly; nothing runs at import time.
"""

from importlib import import_module

from iqstat.errors import CaptureError, IqstatError, MeasurementError, ParameterError, ProfileError

__version__ = "0.1.0"

_LAZY = {
    "Capture": "iqstat.capture",
    "open_capture": "iqstat.formats.open",
    "MeasurementReport": "iqstat.results",
    "measure_file": "iqstat.measure",
    "measure_capture": "iqstat.measure",
    "LinkProfile": "iqstat.profile",
    "load_profile": "iqstat.profile",
    "override_profile": "iqstat.profile",
}

__all__ = [
    "CaptureError",
    "IqstatError",
    "MeasurementError",
    "ParameterError",
    "ProfileError",
    "__version__",
    *_LAZY,
]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'iqstat' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
