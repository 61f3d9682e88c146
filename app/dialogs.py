"""Message boxes that explain: what went wrong (the error's own words) and what to do.

Every error the app shows goes through :func:`show_error`, so the wording is
the same everywhere and tests can record dialogs by monkeypatching
``QMessageBox.exec``.
"""

from __future__ import annotations

from PySide6.QtWidgets import QMessageBox

from fitting.errors import (FitError, ParameterError, PellucidError, RecipeError,
                            SpectrumFormatError, WavelengthRangeError)

__all__ = ["show_error", "show_info", "ask_yes_no", "ask_save_discard_cancel", "advice_for"]


def advice_for(exc: BaseException) -> str:
    """A sentence on what to do about an error, by its type."""
    if isinstance(exc, SpectrumFormatError):
        return ("Open the file in a text editor to check the line named above. If the "
                "columns, separator or units were guessed wrongly, open it again and "
                "correct them in the import preview.")
    if isinstance(exc, WavelengthRangeError):
        return ("Restrict the fit range (Fit section) to wavelengths the materials cover, "
                "or choose a material whose data cover the whole spectrum.")
    if isinstance(exc, RecipeError):
        return ("The file was not loaded and nothing was changed. Correct the named field "
                "in the file, or save a fresh one from the app.")
    if isinstance(exc, ParameterError):
        return "Enter a value inside the bounds, or widen the bounds first."
    if isinstance(exc, FitError):
        return ("Check that the spectrum has enough points inside the fit range and outside "
                "the masked windows, and that at least one parameter is ticked for fitting.")
    if isinstance(exc, PellucidError):
        return "Correct the setting named above and try again."
    if isinstance(exc, OSError):
        return ("Check that the file or folder exists, that you may read/write it, and that "
                "the disk is not full.")
    return ("This is a fault in Pellucid, not in your data. Your work is unchanged; please "
            "save the project and report the details below.")


def show_error(parent, title: str, exc_or_text, *, details: str = "") -> None:
    """Show a modal error box with the message, advice and optional details."""
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Warning)
    box.setWindowTitle(title)
    if isinstance(exc_or_text, BaseException):
        box.setText(f"{title}.\n\n{exc_or_text}")
        box.setInformativeText(advice_for(exc_or_text))
        if not details:
            details = getattr(exc_or_text, "__traceback_text__", "") if not isinstance(
                exc_or_text, PellucidError) else ""
    else:
        box.setText(f"{title}.\n\n{exc_or_text}")
    if details:
        box.setDetailedText(details)
    box.setStandardButtons(QMessageBox.Ok)
    box.exec()


def show_info(parent, title: str, text: str, *, details: str = "") -> None:
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Information)
    box.setWindowTitle(title)
    box.setText(text)
    if details:
        box.setDetailedText(details)
    box.setStandardButtons(QMessageBox.Ok)
    box.exec()


def ask_yes_no(parent, title: str, text: str) -> bool:
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Question)
    box.setWindowTitle(title)
    box.setText(text)
    box.setStandardButtons(QMessageBox.Yes | QMessageBox.No)
    box.setDefaultButton(QMessageBox.No)
    return box.exec() == QMessageBox.Yes


def ask_save_discard_cancel(parent, title: str, text: str) -> str:
    """Ask about unsaved changes: returns "save", "discard" or "cancel".

    Anything but an explicit Save or Don't save (Escape, closing the box) is
    "cancel", so no work is lost by a stray key.
    """
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Question)
    box.setWindowTitle(title)
    box.setText(text)
    box.setStandardButtons(QMessageBox.Save | QMessageBox.Discard | QMessageBox.Cancel)
    box.button(QMessageBox.Discard).setText("Don't save")
    box.setDefaultButton(QMessageBox.Save)
    box.setEscapeButton(QMessageBox.Cancel)
    answer = box.exec()
    return {QMessageBox.Save: "save", QMessageBox.Discard: "discard"}.get(answer, "cancel")
