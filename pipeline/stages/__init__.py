"""The stages of a run, each a plain function returning a frozen product (:mod:`.products`).

``inputs`` (read and validate) -> ``hazard`` (compute mode) -> ``damage`` -> ``events``
-> ``whatif``; ``blocks`` holds the block tasks mapped over blocks with small arguments.
The sequence is :func:`quakefolio.pipeline.runner.execute`.  The entry points most used
are importable from here; each is imported on first use (PEP 562 module ``__getattr__``),
so that importing one stage module does not import the numerical modules of the others
(an unchanged rerun reads its inputs and takes a finished run's tables: it needs none of them).
"""
from importlib import import_module

#: entry point -> the stage module defining it
_WHERE = {
    "combine_damage": "damage", "compute_block": "damage", "plan_blocks": "damage",
    "hazard_at_return_periods_table": "hazard", "site_hazard_table": "hazard",
    "inputs_digest": "inputs", "load_inputs": "inputs", "stage_cache": "inputs", "unique_pairs": "inputs",
    "with_hazard": "inputs",
    "BlockResult": "products", "RunInputs": "products", "WorkBlock": "products",
}

__all__ = ["load_inputs", "inputs_digest", "stage_cache", "with_hazard", "unique_pairs", "plan_blocks",
           "compute_block", "combine_damage", "site_hazard_table", "hazard_at_return_periods_table", "RunInputs",
           "WorkBlock", "BlockResult"]


def __getattr__(name):
    """An entry point of :data:`__all__`, imported from its stage module on first use."""
    if name not in _WHERE:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(f"{__name__}.{_WHERE[name]}"), name)
    globals()[name] = value
    return value
