"""Test configuration: Prefect state in a per-session folder, set before prefect is imported."""
import os
import tempfile
from pathlib import Path

import pytest

# The suite runs in parallel processes (pytest -n) that already fill the cores: a BLAS or OpenMP thread pool of
# the cores' size in each of them (and in every command they start) oversubscribes them, and idle pool threads
# spin.  One thread each; set before numpy is imported.  The numbers do not depend on it within a session:
# every run compared in a test runs with the same setting.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
_STATE = Path(tempfile.mkdtemp(prefix="quakefolio-test-state-"))
os.environ.setdefault("QUAKEFOLIO_STATE", str(_STATE))
#: the session's base state folder (shared by the parallel test processes): the migrated Prefect database lives here
BASE_STATE = Path(os.environ["QUAKEFOLIO_STATE"])
# the memory budget of the size checks (pipeline.stages.sizes), pinned so that what the tests
# expect to be refused does not depend on the machine's free memory
os.environ["QUAKEFOLIO_MEMORY_GIB"] = "8"
if os.environ.get("PYTEST_XDIST_WORKER"):
    # parallel test processes (``pytest -n``): one Prefect state folder (database, server) each
    _WORKER_STATE = Path(os.environ["QUAKEFOLIO_STATE"]) / f"test-{os.environ['PYTEST_XDIST_WORKER']}"
    _WORKER_STATE.mkdir(parents=True, exist_ok=True)
    os.environ["QUAKEFOLIO_STATE"] = str(_WORKER_STATE)

# a shared local Prefect server that a test leaves behind (``quakefolio run`` leaves its server
# for later commands) is stopped by its keeper soon, whatever happens to the session
os.environ.setdefault("QUAKEFOLIO_SERVER_IDLE_S", "120")

from quakefolio.pipeline.env import configure_prefect  # noqa: E402

configure_prefect()

import prefect_template  # noqa: E402
from quakefolio.pipeline import server as _server  # noqa: E402  (light: does not import Prefect)


def seed_state(state):
    """Give the fresh state folder ``state`` a migrated Prefect database before a server starts in it.

    Starting a server on an empty database spends most of its time migrating the schema
    (tests/prefect_template.py); the copy is the same schema, so nothing else changes.
    """
    return prefect_template.seed_state(state, BASE_STATE)


def pytest_configure(config):
    """The controlling process builds the migrated Prefect database in the background while tests are collected."""
    worker = bool(os.environ.get("PYTEST_XDIST_WORKER"))
    if not worker:
        prefect_template.start_build(BASE_STATE)
    if worker or not config.getoption("numprocesses", None):  # a process that runs tests (not the -n controller)
        state = Path(os.environ["QUAKEFOLIO_STATE"])
        home = Path(os.environ.get("PREFECT_HOME", state / "prefect"))
        # its local server's database, and the one of the embedded server of a flow run given no API
        prefect_template.seed_in_background([state / "server" / "prefect.db", home / "prefect.db"], BASE_STATE)


_real_start_server = _server.start_server


def _start_seeded(*args, **kwargs):
    seed_state(_server.state_folder())
    return _real_start_server(*args, **kwargs)


_server.start_server = _start_seeded  # servers started by this process find their schema migrated


def pytest_sessionfinish(session, exitstatus):
    """Stop the shared local server of this session's state folder, if a test started one."""
    from quakefolio.pipeline.server import ServerError, stop_recorded

    try:
        stop_recorded()
    except ServerError:
        pass

REPO = Path(__file__).resolve().parents[1]

#: ``CI`` set (``.ci/run`` sets ``CI=1``): a test that needs a missing tool fails instead of skipping
IN_CI = os.environ.get("CI", "").strip().lower() not in ("", "0", "false", "no")


def missing_tool(reason):
    """Skip the calling test for a missing tool, or fail it loudly in CI (``CI`` set).

    A test that needs a program outside Python (a headless browser) must never pass CI by
    skipping: ``.ci/run`` installs the tool, and if that did not work the suite fails here.
    """
    if IN_CI:
        pytest.fail(f"{reason}; CI is set, so a missing tool fails the test (.ci/run installs it)", pytrace=False)
    pytest.skip(reason)
MINI = REPO / "tests" / "data" / "mini"
DEMO = REPO / "demo_portfolio"


@pytest.fixture
def mini_config(tmp_path):
    """The mini test inputs copied to a temporary folder (outputs land there too)."""
    import shutil

    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst / "quakefolio.toml"


#: Test files that take longest (seconds of one worker, measured on 2 cores): collected first, so that the
#: parallel workers (``--dist loadfile``, files handed out in collection order) start on them and the short
#: files fill the end, instead of one long file finishing alone.  Order only; every test still runs.  The
#: Prefect-server files come after the first minute, when the migrated database (prefect_template) is ready.
HEAVY_FILES = {
    "test_golden_tables.py": 75, "test_report.py": 60, "test_fault_injection.py": 45, "test_reliability.py": 42,
    "test_operations.py": 40, "test_bad_inputs.py": 38, "test_report_explains.py": 30, "test_compare.py": 25,
    "test_report_visual.py": 25, "test_cache.py": 25, "test_flow.py": 20, "test_hostile_store.py": 20,
    "test_logic_tree_events.py": 18, "test_scale_paths.py": 16, "test_export_history.py": 16,
}


def pytest_collection_modifyitems(session, config, items):
    """Heaviest files first (:data:`HEAVY_FILES`), the others in their usual order after them."""
    items.sort(key=lambda item: -HEAVY_FILES.get(item.path.name, 0))
