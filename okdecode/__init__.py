"""okdecode: receive and decode on-off keyed recordings.

The public names are imported on first use, so ``import okdecode`` stays fast.
"""

from __future__ import annotations

__version__ = "0.1.0"

#: Decision methods: "sequence", the soft-decision sequence decoder (okdecode.sequence),
#: which starts from the threshold's decision; "threshold", the adaptive threshold,
#: element by element (the baseline, and the only one for pulsed carriers).
DECODERS = ("sequence", "threshold")
#: The decoder used where none is named.
DEFAULT_DECODER = "sequence"

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

__all__ = sorted(_PUBLIC) + ["DECODERS", "DEFAULT_DECODER", "__version__"]


def __getattr__(name: str):
    if name in _PUBLIC:
        import importlib

        value = getattr(importlib.import_module(_PUBLIC[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'okdecode' has no attribute {name!r}")
