"""filmmap: oxide thickness maps and furnace-run advice from optical spectra.

The end-to-end API, for a notebook as for the command line::

    import filmmap

    config = filmmap.read_lot_file("lot.toml")              # the lot file, checked
    reduction = filmmap.reduce_lot("lot.toml", config=config)  # every site fitted
    reduction, written, seconds = filmmap.reduce_to_folder("lot.toml", "results/")
    view = filmmap.lot_view(written.dataset, config)         # uniformity, verdicts

These four names are imported on first use (PEP 562), so ``import filmmap`` stays light.
"""

__version__ = "0.1.0"

_API = {
    "reduce_to_folder": "filmmap.pipeline.run",
    "reduce_lot": "filmmap.pipeline.reducing",
    "read_lot_file": "filmmap.io.lotfile",
    "lot_view": "filmmap.lotstats.view",
}

__all__ = ["__version__", *_API]


def __getattr__(name):
    module = _API.get(name)
    if module is None:
        raise AttributeError(f"module 'filmmap' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_API))
