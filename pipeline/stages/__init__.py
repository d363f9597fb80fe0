"""The stages of a run, each a plain function returning a frozen product (:mod:`.products`).

``inputs`` (read and validate) -> ``hazard`` (compute mode) -> ``damage`` -> ``events``
-> ``whatif``; ``blocks`` holds the block tasks mapped over blocks with small arguments.
The sequence is :func:`quakefolio.pipeline.runner.execute`.  The entry points most used
are importable from here.
"""
from quakefolio.pipeline.stages.damage import combine_damage, compute_block, plan_blocks
from quakefolio.pipeline.stages.hazard import hazard_at_return_periods_table, site_hazard_table
from quakefolio.pipeline.stages.inputs import inputs_digest, load_inputs, stage_cache, unique_pairs, with_hazard
from quakefolio.pipeline.stages.products import BlockResult, RunInputs, WorkBlock

__all__ = ["load_inputs", "inputs_digest", "stage_cache", "with_hazard", "unique_pairs", "plan_blocks",
           "compute_block", "combine_damage", "site_hazard_table", "hazard_at_return_periods_table", "RunInputs",
           "WorkBlock", "BlockResult"]
