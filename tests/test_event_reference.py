"""The benchmark's tight reference (benchmarks/reference_events.py) computes what the event stage
computes: the same event losses, per-building sums and exceedance counts, on small invented
inputs with per-building terms on two buildings in three (the benchmark's ratio is only
meaningful while the two agree)."""
from __future__ import annotations

import sys

import numpy as np
import pytest

from conftest import REPO

sys.path.insert(0, str(REPO / "benchmarks"))
from bench_portfolio import write_inputs  # noqa: E402
from reference_events import reference_event_losses  # noqa: E402


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    from quakefolio.pipeline import stages

    folder = tmp_path_factory.mktemp("bench-inputs")
    return stages.load_inputs(write_inputs(folder, 1200, n_assets=600, n_sites=90, terms=True, event_block_size=256))


def test_reference_agrees_with_the_stage(inputs):
    from quakefolio.core.events.losses import sum_over_blocks
    from quakefolio.pipeline.stages import events as ps

    em = ps.prepare_events(inputs)
    results = [ps.event_chunk(em, c) for c in ps.event_chunks(em)]
    assert len(results) > 1 and em.events.n_events > 256  # several chunks and random-number blocks
    ref = reference_event_losses(inputs)
    np.testing.assert_array_equal(ref["events"].rupture, em.events.rupture)
    np.testing.assert_array_equal(ref["exceed_counts"], sum(r.exceed_counts for r in results))
    # the same sums in another order of addition: round-off only (non-negative terms)
    for key, got in (("ground_up", np.concatenate([r.ground_up for r in results])),
                     ("net", np.concatenate([r.net for r in results])),
                     ("asset_sum", sum_over_blocks([r.asset_sum for r in results])),
                     ("asset_sumsq", sum_over_blocks([r.asset_sumsq for r in results]))):
        np.testing.assert_allclose(got, ref[key], rtol=1e-12, atol=0, err_msg=key)
    gu, net = ref["ground_up"], ref["net"]
    assert (gu > 0).mean() > 0.5 and (net < gu).any() and (net <= gu * (1 + 1e-12)).all()


def test_stage_identical_whatever_the_thread_count(inputs):
    # the blocks of a chunk (and its groups of ruptures) on 1 or 3 threads: every value bit for bit
    # (quakefolio.core.events.threads); per-building terms on two buildings in three
    import dataclasses

    from quakefolio.pipeline.stages import events as ps

    em = dataclasses.replace(ps.prepare_events(inputs), chunk_blocks=2)
    runs = [[ps.event_chunk(dataclasses.replace(em, workers=w), c) for c in ps.event_chunks(em)] for w in (1, 3)]
    assert len(runs[0]) > 1 and runs[0][0].asset_sum.shape[0] == 2
    for one, three in zip(*runs):
        for key in ("ground_up", "net", "asset_sum", "asset_sumsq", "class_sum", "exceed_counts"):
            np.testing.assert_array_equal(getattr(one, key), getattr(three, key), err_msg=key)
