"""Entry point of the desktop app: ``pellucid gui [PROJECT]`` or ``python -m app.main``.

Installs an exception hook so that a fault never kills the window silently: it
is shown in a dialog with the details and printed to stderr.
"""

from __future__ import annotations

import argparse
import sys
import traceback

__all__ = ["main", "install_excepthook"]


def install_excepthook(parent_getter=lambda: None):
    """Show uncaught exceptions (including those in Qt slots) in a dialog, never crash."""
    def hook(exc_type, exc, tb):
        text = "".join(traceback.format_exception(exc_type, exc, tb))
        sys.stderr.write(text)
        if issubclass(exc_type, KeyboardInterrupt):
            return
        try:
            from .dialogs import show_error
            exc.__traceback_text__ = text
            show_error(parent_getter(), "Unexpected problem", exc, details=text)
        except Exception:  # noqa: BLE001 - the hook itself must never raise
            pass
    sys.excepthook = hook
    return hook


def main(argv=None) -> int:
    """Start the GUI; optional argument: a project (``*.pellucid.json``) or a spectrum."""
    parser = argparse.ArgumentParser(prog="pellucid gui",
                                     description="Pellucid desktop app")
    parser.add_argument("path", nargs="?", help="project or spectrum file to open")
    parser.add_argument("--theme", choices=("system", "light", "dark"), default=None,
                        help="colour theme (default: the last one used)")
    parser.add_argument("--settings", metavar="FILE", default=None,
                        help="keep window layout, recent files and folders in this INI file "
                             "instead of the user's settings (portable use, tests)")
    args = parser.parse_args(argv)

    from PySide6.QtCore import QSettings
    from PySide6.QtWidgets import QApplication

    from .theme import apply_theme
    from .window import MainWindow

    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setApplicationName("Pellucid")
    app.setOrganizationName("Pellucid")
    settings = (QSettings(args.settings, QSettings.IniFormat) if args.settings
                else QSettings("Pellucid", "Pellucid"))
    apply_theme(app, args.theme or str(settings.value("theme", "system")))
    win = MainWindow(settings)
    install_excepthook(lambda: win)
    win.show()
    if args.path:
        if args.path.endswith(".json"):
            win.open_project(args.path)
        else:
            win.open_spectrum(args.path, ask=None)
    code = app.exec()
    win.shutdown_jobs()
    return int(code or 0)


if __name__ == "__main__":
    sys.exit(main())
