"""Pellucid desktop app (PySide6). Views and controllers only: all physics is in ``fitting``."""
