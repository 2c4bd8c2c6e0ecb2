"""Longrun's desktop app: PySide6 views over :mod:`core`.

The app computes nothing the command line cannot.  Its pieces:

``document.py``
    :class:`~app.document.Document`, the one source of truth per open chain
    (the immutable :class:`core.model.Chain`, its file, its undo stack and the
    shared selection).  Every edit is a ``QUndoCommand`` storing the chain
    before and after.  Signals: ``chainChanged(old, new)`` after every edit,
    undo, redo or load; ``changed()`` (same moment, no arguments);
    ``fileChanged()`` (path or saved state); ``selectionChanged()``.
``analysis_service.py``
    :class:`~app.analysis_service.AnalysisService`: re-validates and analyses
    the document off the GUI thread, debounced, dropping stale results.
    Panels add their own computations with ``service.register(name, fn)`` and
    listen to ``resultReady(name, result)``; ``validated(report)`` and
    ``structureReady(report)`` are always available.
``panels.py``
    The dock registry: a panel is a :class:`~app.panels.PanelSpec` whose
    factory receives a :class:`~app.panels.Workspace` (document, analysis
    service, settings, window) and returns a widget.  Modules listed in
    :data:`~app.panels.PANEL_MODULES` expose ``PANELS``; the window builds one
    dock per spec and lists it in the View menu.
``canvas.py``, ``grid.py``, ``checks.py``
    The node-and-arrow editor, the matrix grid, the list of model checks.
``window.py``, ``main.py``, ``screenshot.py``
    The main window (menus, files, recent files, drag and drop), application
    start-up and the ``--screenshot`` mode of ``longrun gui``.
``settings.py``, ``recovery.py``, ``palette.py``, ``dialogs.py``
    Settings (every key declared once), autosave and crash recovery, the
    visual language (colour-blind-safe colours plus non-colour cues), and the
    few modal dialogs (one module so tests can replace them).
"""
