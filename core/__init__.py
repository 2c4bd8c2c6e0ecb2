"""Longrun's computation: chains, validation, exact long-run analysis, simulation.

Nothing here imports Qt.  Submodules are imported where they are used so that
``import core`` stays fast; the usual entry points are::

    from core.io import load_chain
    chain = load_chain("sample_models/pump_wear.json")
    P = chain.matrix()          # validated dense matrix
"""
__version__ = "0.1.0"
