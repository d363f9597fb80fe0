"""The Prefect flow against the plain library path (embedded server).

The demo end to end through the command (flow path, report) runs in ``test_golden_tables.py``,
where its tables are also compared with the reference code's."""
import pandas as pd
import pytest

from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table

TABLES = ["site_hazard", "hazard_at_return_periods", "asset_damage", "asset_loss", "asset_loss_curve"]


@pytest.mark.flow
def test_flow_equals_pure_library_path(mini_config):
    from quakefolio.pipeline.flow import run_flow

    flow_run = run_flow(mini_config, max_workers=2)
    pure_run = run_pure(mini_config)
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(flow_run, name), read_table(pure_run, name), check_exact=True)


@pytest.mark.flow
def test_blocks_batched_into_few_task_runs_give_the_same_tables(mini_config, monkeypatch):
    """On the thread pool a stage's blocks go round-robin to a few task runs; results keep the blocks' order."""
    from quakefolio.pipeline import flow
    from quakefolio.pipeline.flow import BATCHES_PER_WORKER, run_flow

    text = mini_config.read_text()
    mini_config.write_text(text + "\n[execution]\nmax_workers = 1\nblock_size = 1\n")  # 5 pairs: 5 blocks, 2 tasks
    batches, run_batch = [], flow._run_batch

    def counted(fn, name, ref, batch):
        batches.append(len(batch))
        return run_batch(fn, name, ref, batch)

    monkeypatch.setattr(flow, "_run_batch", counted)
    flow_run = run_flow(mini_config, max_workers=1)
    assert sorted(batches) == [2, 3] and BATCHES_PER_WORKER == 2  # the damage stage's 5 blocks in 2 task runs
    pure_run = run_pure(mini_config)
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(flow_run, name), read_table(pure_run, name), check_exact=True)
