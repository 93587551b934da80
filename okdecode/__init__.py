"""okdecode: receive and decode on-off keyed recordings.

The public names are imported on first use, so ``import okdecode`` stays fast.
"""

from __future__ import annotations

__version__ = "0.1.0"

_PUBLIC = {
    "decode_file": "okdecode.receiver",
    "decode_array": "okdecode.receiver",
    "decode_capture": "okdecode.receiver",
    "decode_all_carriers": "okdecode.receiver",
    "open_capture": "okdecode.capture",
    "synth": "okdecode.synth",
    "synth_file": "okdecode.synth",
    "verify_file": "okdecode.verify",
    "plot_reception": "okdecode.plot",
    "write_figure": "okdecode.plot",
    "Reception": "okdecode.report",
    "OkDecodeError": "okdecode.errors",
    "CaptureError": "okdecode.errors",
    "ParameterError": "okdecode.errors",
}

__all__ = sorted(_PUBLIC) + ["__version__"]


def __getattr__(name: str):
    if name in _PUBLIC:
        import importlib

        value = getattr(importlib.import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'okdecode' has no attribute {name!r}")
