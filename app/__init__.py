"""Pellucid desktop app (PySide6). Views and controllers only: all physics is in ``fitting``.

Where things live:

=====================  ====================================================================
``main.py``            ``main(argv)``: entry point of ``pellucid gui``, exception hook
``window.py``          ``MainWindow``: sections 1-4 left to right, menus, shortcuts, settings,
                       file dialogs, fit start/cancel, export, projects, recipes
``session.py``         ``Session``: spectrum, stack, options, masks, result + change signals;
                       every edit is an undoable command; result out of date / unsaved
``worker.py``          ``Job``: the only module that touches threads (fit, batch, figures)
``spectrum_panel.py``  section 1: the loaded file
``import_dialog.py``   import preview with correctable detection
``reference_dialog.py`` 100 % line and dark correction (also used by the import preview)
``stack_panel.py``     section 2: substrate, layers, models, known layers (also from an
                       earlier result's n, κ export)
``param_table.py``     the parameter table (QAbstractTableModel) with refusals
``fit_panel.py``       section 3: range, geometry, corrections, start, band gap,
                       Fit / Suggest a model / Cancel
``plot_panel.py``      the central plot: measured, model, residuals, masks, cursor read-out
``result_panel.py``    section 4: summary, n κ α, Tauc, correlation, report; the
                       out-of-date banner; figures drawn off the GUI thread
``suggestion_view.py`` the Models result tab: a model suggestion's choice, reason and BIC
                       ranking, and "Use … in the stack"
``export_dialog.py``   which files an export writes (tables, curves, JSON, text, figures, PDF)
``batch_dialog.py``    batch run of a folder with progress and summary table
``dialogs.py``         error boxes that say what to do
``theme.py``           light/dark palettes and matplotlib colours from the palette
``bench.py``           ``python -m app.bench``: longest GUI-thread stall per user step
=====================  ====================================================================
"""
