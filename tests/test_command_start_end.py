"""How the ``quakefolio`` program starts and ends: Prefect imported while large inputs are read, a prompt exit.

On the flow path, Prefect's import (about 1.5 s) overlaps the reading of an exposure file
of :data:`quakefolio.pipeline.cli.IMPORT_PREFECT_MEANWHILE_BYTES` or more; a small one, the
``--no-flow`` path and an unchanged rerun never import Prefect for it.  After ``run`` and
``hazard`` the program (:func:`quakefolio.pipeline.cli.command`) ends with ``os._exit`` once its
output is flushed; other commands exit as usual (``tests/test_operations.py`` stops a served
schedule with Ctrl-C).  Exit status and printed lines are those of
:func:`quakefolio.pipeline.cli.main`.
"""
from __future__ import annotations

import json
import subprocess
import sys

from quakefolio.pipeline.io.store import latest_run

#: Decides, in a fresh interpreter, whether Prefect is imported meanwhile; reads the inputs; prints what it saw.
_MEANWHILE = """
import json, sys
import quakefolio.pipeline.cli as cli
from quakefolio.pipeline.env import PREFECT_MODULES
from quakefolio.pipeline.io.config import load_config
from quakefolio.pipeline.stages import load_inputs

config = load_config(sys.argv[1])
parse = cli._parser().parse_args
seen = {"small": cli._import_prefect_meanwhile(parse(["run", sys.argv[1]]), config) is None}
cli.IMPORT_PREFECT_MEANWHILE_BYTES = 0  # as if the exposure were large
seen["no_flow"] = cli._import_prefect_meanwhile(parse(["run", sys.argv[1], "--no-flow"]), config) is None
seen["dask"] = cli._import_prefect_meanwhile(parse(["run", sys.argv[1], "--executor", "dask"]), config) is None
seen["before"] = "prefect" in sys.modules
thread = cli._import_prefect_meanwhile(parse(["run", sys.argv[1]]), config)
inputs = load_inputs(config)
thread.join()
seen["missing"] = [m for m in PREFECT_MODULES if m not in sys.modules]
seen["assets"] = len(inputs.exposure)
print(json.dumps(seen))
"""


def test_prefect_is_imported_while_a_large_exposure_is_read_on_the_local_flow_path(mini_config):
    proc = subprocess.run([sys.executable, "-c", _MEANWHILE, str(mini_config)], capture_output=True, text=True,
                          timeout=300, cwd=mini_config.parent)
    assert proc.returncode == 0, proc.stderr[-2000:]
    seen = json.loads(proc.stdout.splitlines()[-1])
    assert seen["small"] and seen["no_flow"] and seen["dask"] and not seen["before"]
    assert seen["missing"] == [] and seen["assets"] > 0


def _program(*args, cwd):
    return subprocess.run([sys.executable, "-m", "quakefolio.pipeline", *args], capture_output=True, text=True,
                          timeout=300, cwd=cwd)


def test_the_program_exits_promptly_with_the_status_and_lines_of_main(mini_config):
    proc = _program("run", str(mini_config), "--quiet", "--no-flow", cwd=mini_config.parent)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout == f"{latest_run(mini_config.parent / 'output')}\n" and proc.stderr == ""
    bad = _program("run", str(mini_config.parent / "missing.toml"), cwd=mini_config.parent)
    assert bad.returncode == 2 and bad.stdout == ""
    assert bad.stderr.startswith("error: ") and bad.stderr.count("\n") == 1 and "missing.toml" in bad.stderr
    other = _program("report", str(mini_config.parent / "missing-run"), cwd=mini_config.parent)  # the usual exit
    assert other.returncode == 2 and other.stderr.startswith("error: ") and other.stderr.count("\n") == 1
