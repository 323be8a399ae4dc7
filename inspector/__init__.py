"""inspector: learn each fixed camera's normal appearance, flag frames that do not fit it."""

__version__ = "0.14.0"
