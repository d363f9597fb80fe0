"""Block tasks: the functions mapped over blocks, with small arguments only.

Every block task takes a :class:`~quakefolio.pipeline.stages.products.RunRef` (paths and
digests) and its block (a site slice, a :class:`~quakefolio.pipeline.stages.products.WorkBlock`,
a chunk of event blocks), and finds its run's products with :func:`resolve`:

* in the process that read the inputs (the plain path, a thread pool) they were
  registered by the driver (:func:`register`) and are used as they are;
* in any other process (a Dask worker) the inputs are read again from the config path,
  once per process and run; a digest that differs from the driver's refuses the task
  instead of computing on other inputs; in compute mode the part curves (every source
  branch, region and model) come from the ``.npy`` file the driver wrote
  (:func:`publish_hazard`) and pass through the same
  :func:`quakefolio.pipeline.stages.hazard.with_part_curves`, so a block gives the same
  numbers in every process (the hazard fractiles, which only the driver writes, are not
  computed again there).  Workers must see the input files and the output folder
  under the same paths as the driver (a shared file system).

The same functions therefore run unchanged in this thread, in a thread pool or on Dask:
no executor needs to know where its tasks run.
"""
from __future__ import annotations

import hashlib
import io
import shutil
import threading
import uuid
from collections import OrderedDict
from contextlib import contextmanager
from dataclasses import replace
from pathlib import Path

import numpy as np

from quakefolio.pipeline.io.store import atomic_write_bytes
from quakefolio.pipeline.stages import events as ps
from quakefolio.pipeline.stages import hazard as hs
from quakefolio.pipeline.stages import spectrum
from quakefolio.pipeline.stages.damage import compute_block
from quakefolio.pipeline.stages.inputs import load_inputs, stage_cache, with_hazard
from quakefolio.pipeline.stages.products import RunRef

__all__ = ["register", "register_events", "resolve", "publish_hazard", "work_folder", "hazard_task",
           "disagg_task", "spectrum_task", "damage_task", "event_task", "clear", "resolved_runs"]

#: Runs whose products one process keeps at once.
KEEP_RUNS = 2


class _Entry:
    """The products of one run in this process (filled lazily, under ``lock``)."""

    def __init__(self):
        self.lock = threading.Lock()
        self.inputs = None
        self.event_model = None


_RUNS: OrderedDict = OrderedDict()
_RUNS_LOCK = threading.Lock()


def _key(ref):
    return ref.config_path, ref.inputs_sha256, ref.hazard_sha256


def _entry(ref):
    with _RUNS_LOCK:
        entry = _RUNS.get(_key(ref))
        if entry is None:
            entry = _RUNS[_key(ref)] = _Entry()
            while len(_RUNS) > KEEP_RUNS:
                _RUNS.popitem(last=False)
        else:
            _RUNS.move_to_end(_key(ref))
    return entry


def clear():
    """Forget every run this process holds."""
    with _RUNS_LOCK:
        _RUNS.clear()


def resolved_runs():
    """Config paths of the runs whose products this process holds (for diagnostics).

    Returns
    -------
    list of str
        Oldest first; at most :data:`KEEP_RUNS` entries.
    """
    with _RUNS_LOCK:
        return [key[0] for key in _RUNS]


def register(inputs, ref=None):
    """Make ``inputs`` the products of ``ref`` in this process.

    Parameters
    ----------
    inputs : RunInputs
    ref : RunRef or None
        None: a new reference to ``inputs`` (config path and inputs digest).

    Returns
    -------
    RunRef
    """
    if ref is None:
        ref = RunRef(str(Path(inputs.config.path).resolve()), inputs.inputs_sha256)
    entry = _entry(ref)
    with entry.lock:
        entry.inputs = inputs
    return ref


def register_events(ref, event_model):
    """Make ``event_model`` (from :func:`quakefolio.pipeline.stages.events.prepare_events`) that of ``ref``.

    Parameters
    ----------
    ref : RunRef
        The run the event model belongs to.
    event_model : quakefolio.pipeline.stages.events.EventModel
        Prepared by the driver; event tasks of ``ref`` in this process use it instead of
        preparing their own.
    """
    entry = _entry(ref)
    with entry.lock:
        entry.event_model = event_model


def _read_inputs(ref):
    """The inputs of ``ref`` read from its files; they must give the driver's digest."""
    inputs = load_inputs(ref.config_path)
    if inputs.inputs_sha256 != ref.inputs_sha256:
        raise RuntimeError(
            f"the inputs of {ref.config_path} read in this process (digest {inputs.inputs_sha256[:12]}) differ from "
            f"the driver's ({ref.inputs_sha256[:12]}): a file changed during the run, or this worker sees other "
            "files under the same paths")
    if ref.hazard_file is not None:
        curves = np.load(ref.hazard_file, allow_pickle=False)
        model, hazard = hs.with_part_curves(inputs.hazard_model, inputs.hazard, curves, fractiles=False)
        inputs = with_hazard(inputs, model, hazard)
    return inputs


def resolve(ref):
    """The run inputs of ``ref`` in this process (registered, or read once from its files).

    Parameters
    ----------
    ref : RunRef

    Returns
    -------
    RunInputs
    """
    entry = _entry(ref)
    with entry.lock:  # threads of one process read a run once
        if entry.inputs is None:
            entry.inputs = _read_inputs(ref)
        return entry.inputs


def _event_model(ref):
    entry = _entry(ref)
    inputs = resolve(ref)
    with entry.lock:
        if entry.event_model is None:
            entry.event_model = ps.prepare_events(inputs)
        return entry.event_model


@contextmanager
def work_folder(inputs):
    """A fresh folder under ``<output>/.work/`` for files other processes read; removed afterwards.

    Parameters
    ----------
    inputs : RunInputs

    Yields
    ------
    Path
        Created on first use by :func:`publish_hazard`.
    """
    root = Path(inputs.config.output.folder).resolve() / ".work"
    folder = root / uuid.uuid4().hex
    try:
        yield folder
    finally:
        if folder.exists():
            shutil.rmtree(folder, ignore_errors=True)
            try:
                root.rmdir()
            except OSError:
                pass


def publish_hazard(ref, inputs, folder):
    """Write the part curves where other processes can read them; register ``inputs`` under the new reference.

    Parameters
    ----------
    ref : RunRef
    inputs : RunInputs
        With computed hazard.
    folder : Path
        From :func:`work_folder`.

    Returns
    -------
    RunRef
        ``ref`` with ``hazard_file`` and ``hazard_sha256``.
    """
    curves = np.ascontiguousarray(inputs.hazard_model.part_curves)
    sha = hashlib.sha256(curves.tobytes()).hexdigest()
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"part_curves-{sha[:16]}.npy"
    buffer = io.BytesIO()
    np.save(buffer, curves, allow_pickle=False)
    atomic_write_bytes(path, buffer.getvalue())
    return register(inputs, replace(ref, hazard_file=str(path), hazard_sha256=sha))


def hazard_task(ref, block):
    """:func:`quakefolio.pipeline.stages.hazard.hazard_block` for one site slice of the run ``ref``.

    Parameters
    ----------
    ref : RunRef
        The run (its inputs are resolved in this process, :func:`resolve`).
    block : tuple (lo, hi)
        Site slice [lo, hi) of the hazard sites.

    Returns
    -------
    SiteBlockResult
        Part curves ``(n_src, n_columns, n_im, n_block_sites, n_levels)`` [1/yr]
        (:func:`quakefolio.pipeline.stages.hazard.hazard_block`).
    """
    inputs = resolve(ref)
    return hs.hazard_block(inputs.hazard_model, inputs.hazard, block, stage_cache(inputs))


def disagg_task(ref, block):
    """:func:`quakefolio.pipeline.stages.hazard.disagg_block` for one site slice (needs the computed hazard).

    Parameters
    ----------
    ref : RunRef
        The run, with ``hazard_file`` set in other processes (:func:`publish_hazard`).
    block : tuple (lo, hi)
        Site slice [lo, hi) of the hazard sites.

    Returns
    -------
    SiteBlockResult
        Contributions ``(n_im, n_block_sites, n_rp, n_mag, n_dist, n_eps)`` [1/yr].
    """
    inputs = resolve(ref)
    return hs.disagg_block(inputs.hazard_model, inputs.hazard, inputs.config.hazard.return_periods_yr, block,
                           stage_cache(inputs))


def spectrum_task(ref, block):
    """:func:`quakefolio.pipeline.stages.spectrum.spectrum_block` for one site slice (needs the computed hazard).

    Parameters
    ----------
    ref : RunRef
        The run, with ``hazard_file`` set in other processes (:func:`publish_hazard`).
    block : tuple (lo, hi)
        Site slice [lo, hi) of the hazard sites.

    Returns
    -------
    SiteBlockResult
        Spectral sums ``(n_cond, n_block_sites, n_rp, 2, n_periods)`` and disaggregation moments.
    """
    inputs = resolve(ref)
    hz = inputs.config.hazard
    return spectrum.spectrum_block(inputs.hazard_model, inputs.hazard, spectrum.conditioning_ims(inputs.config),
                                   hz.cms_return_periods_yr, hz.rate_floor, block, stage_cache(inputs))


def damage_task(ref, block):
    """:func:`quakefolio.pipeline.stages.damage.compute_block` for one block of (site, class) pairs.

    Parameters
    ----------
    ref : RunRef
        The run (its inputs are resolved in this process, :func:`resolve`).
    block : WorkBlock
        One building class and a set of its sites.

    Returns
    -------
    BlockResult
        Damage-state rates [1/yr], tail shares [-], EAL ratios [1/yr] and loss curves of
        the block's pairs.
    """
    return compute_block(resolve(ref), block)


def event_task(ref, chunk):
    """:func:`quakefolio.pipeline.stages.events.event_chunk` for one chunk of event blocks.

    Parameters
    ----------
    ref : RunRef
        The run (its event model is registered or prepared once in this process).
    chunk : (int, int)
        First and stop random-number block
        (:func:`quakefolio.pipeline.stages.events.event_chunks`).

    Returns
    -------
    quakefolio.pipeline.stages.events.ChunkResult
        Event losses [currency] and per-block sums of the chunk.
    """
    return ps.event_chunk(_event_model(ref), chunk)
