import os

# GUI tests run offscreen everywhere (CI has no screen).
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
os.environ.setdefault("MPLBACKEND", "Agg")
