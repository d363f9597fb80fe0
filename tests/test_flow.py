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
