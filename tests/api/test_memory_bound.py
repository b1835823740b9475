"""The memory estimate is an upper bound: the largest design the caps allow runs inside it.

A solver process of its own gets an address-space limit (``resource.setrlimit(RLIMIT_AS)``)
of what it already maps plus the design memory cap, then runs the largest design the cap
allows (the example plant, Hp = 2000, the longest control horizon within the cap); it must
answer, and one move longer must be refused with a 422 naming the horizons, never a
``MemoryError``.  The cap is set low here (96 MiB) to keep the test to seconds; the default's
fit to the pod limit of ``deploy/`` is checked from the manifest's own numbers.
"""

from __future__ import annotations

import copy
import os
import re
import time
from pathlib import Path

import numpy as np
import pytest
import yaml

from service.api.compute import SolverPool
from service.api.settings import Settings
from service.errors import ComputeOutOfMemory, InvalidRequest
from service.pipeline.caps import Caps
from service.pipeline.design import run_design
from service.pipeline.estimates import design_memory_bytes
from service.pipeline.examples import load_example
from service.pipeline.memory import request_memory
from service.schemas.design import DesignRequest
from tests.conftest import random_design_request

ROOT = Path(__file__).resolve().parents[2]
resource = pytest.importorskip("resource")
pytestmark = pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads /proc/self/status")

CAP = 96 * 1024 * 1024
#: Address space for what the estimate leaves out on purpose: Python objects of the request
#: and the answer, and allocator slack (common practice: a few tens of MiB).
SLACK = 48 * 1024 * 1024
#: Measured beside the solver's arrays in one pod: serving process, fork server and the
#: solver's own interpreter and libraries (issue 15: 1.37 GB in all for 895 MB of arrays).
OVERHEAD = 475 * 1000 * 1000


def mapped_bytes() -> int:
    text = Path("/proc/self/status").read_text()
    return int(re.search(r"^VmSize:\s+(\d+) kB", text, flags=re.M).group(1)) * 1024


def design_within(body: dict, caps: Caps, extra: int) -> str:
    """Run in a solver process: limit its address space, then design (module level: it pickles)."""
    limit = mapped_bytes() + extra
    resource.setrlimit(resource.RLIMIT_AS, (limit, resource.getrlimit(resource.RLIMIT_AS)[1]))
    try:
        run_design(DesignRequest.model_validate(body), caps)
    except MemoryError:
        return "memory"
    except InvalidRequest as exc:
        return "invalid:" + ",".join(p.pointer for p in exc.problems)
    return "ok"


def largest_control(prediction: int) -> int:
    """The longest control horizon of the example plant (n 4, m p 2) within the cap."""
    return max(
        hu
        for hu in range(1, prediction + 1)
        if design_memory_bytes(states=4, inputs=2, outputs=2, penalized_steps=prediction, control=hu) <= CAP
    )


def test_the_largest_design_the_cap_allows_runs_inside_it_and_one_more_move_is_refused():
    caps = Caps(max_design_memory_bytes=CAP)
    hu = largest_control(2000)
    body = copy.deepcopy(load_example("design_request.json"))
    body["horizons"] = {"prediction": 2000, "control": hu}
    pool = SolverPool(processes=1)
    try:
        outcome, _ = pool.run(design_within, (body, caps, CAP + SLACK), deadline=time.monotonic() + 300, seconds=300)
        assert outcome == "ok"
    finally:
        pool.close()  # its solver keeps the limit: never reused
    body["horizons"]["control"] = hu + 1
    pool = SolverPool(processes=1)
    try:
        outcome, _ = pool.run(design_within, (body, caps, CAP + SLACK), deadline=time.monotonic() + 300, seconds=300)
        assert outcome == "invalid:/horizons/control,/horizons/prediction"
    finally:
        pool.close()


def test_the_default_cap_fits_the_pod_memory_limit_of_deploy():
    manifest = yaml.safe_load((ROOT / "deploy" / "kubernetes" / "deployment.yaml").read_text())
    (container,) = manifest["spec"]["template"]["spec"]["containers"]
    limit = container["resources"]["limits"]["memory"]
    pod = int(limit[:-2]) * {"Mi": 1024**2, "Gi": 1024**3}[limit[-2:]]
    assert Caps().max_design_memory_bytes + OVERHEAD + SLACK <= pod
    # Every compute process at its largest at once: the heavy lane's processes up to the request
    # cap, each light-lane process up to the memory that sends a request to the heavy lane
    # (service/pipeline/memory.py), with the process counts the ConfigMap sets.
    settings = yaml.safe_load((ROOT / "deploy" / "kubernetes" / "configmap.yaml").read_text())["data"]
    light = int(settings["MOVECAST_SOLVER_PROCESSES"])
    heavy = int(settings.get("MOVECAST_HEAVY_SOLVER_PROCESSES", Settings().heavy_solver_processes))
    heavy_memory = int(settings.get("MOVECAST_HEAVY_MEMORY_BYTES", Settings().heavy_memory_bytes))
    busy = heavy * Caps().max_request_memory_bytes + light * heavy_memory
    # The serving process's answer cache, full (service/api/answer_cache.py), and the answers it
    # holds while it sends them (service/api/answer_memory.py) come on top.
    cache = int(settings.get("MOVECAST_ANSWER_CACHE_BYTES", Settings().answer_cache_bytes))
    answers = int(settings.get("MOVECAST_MAX_ANSWER_MEMORY_BYTES", Settings().max_answer_memory_bytes))
    assert busy + cache + answers + OVERHEAD + SLACK <= pod
    # The answer bound holds the largest /design answer the response cap allows, alone.
    # (a square plant of 31 inputs and outputs at the longest horizon: 31 * 31 * 2000 gain entries)
    hp, signals = Caps().max_prediction_horizon, 31
    assert signals * signals * hp <= Caps().max_response_entries < (signals + 1) ** 2 * hp
    body = random_design_request(np.random.default_rng(1), states=10, signals=signals, prediction=hp, control=1)
    assert request_memory(DesignRequest.model_validate(body)).served <= answers
    # The design of issue 15 (the example plant, Hp = Hu = 2000) is refused by the default cap.
    assert (
        design_memory_bytes(states=4, inputs=2, outputs=2, penalized_steps=2000, control=2000)
        > Caps().max_design_memory_bytes
    )


def test_a_memory_error_in_the_solver_is_a_422_problem(make_client, example, monkeypatch):
    from service.api import compute
    from tests.api.conftest import assert_problem

    client = make_client(solver_processes=1)

    def out_of_memory(*args, **kwargs):
        raise ComputeOutOfMemory("the solver ran out of memory")

    async def out_of_memory_on_the_loop(*args, **kwargs):
        out_of_memory()

    monkeypatch.setattr(compute.SolverPool, "run", out_of_memory)
    monkeypatch.setattr(compute.SolverPool, "arun", out_of_memory_on_the_loop)  # a light design
    body = assert_problem(client.post("/design", json=example), 422, "out-of-memory")
    assert "memory" in body["detail"]
    assert os.getpid()  # the serving process itself is untouched


def _compose_bytes(size: str) -> int:
    """A Compose byte value ("1g", "1280m", "512k", "1024b"; Compose file reference, units b k m g)."""
    number, unit = re.fullmatch(r"(\d+)([bkmg]?)", size.lower()).groups()
    return int(number) * {"": 1, "b": 1, "k": 1024, "m": 1024**2, "g": 1024**3}[unit]


def test_the_compose_memory_limit_holds_every_process_at_its_caps():
    """The sum of the Kubernetes check above, for deploy/compose.yaml, once per worker process.

    Each worker has its own serving process, fork server and both lanes, so everything (its
    footprint included, as measured for one) counts once per worker.  The light lane must be
    sized in the file, so that the sum does not hang on its default (a process per CPU).
    """
    compose = yaml.safe_load((ROOT / "deploy" / "compose.yaml").read_text())
    (service,) = compose["services"].values()
    environment = {k: str(v) for k, v in service["environment"].items()}
    default_workers = re.fullmatch(r"\$\{MOVECAST_WORKERS:-(\d+)\}", environment["MOVECAST_WORKERS"])
    workers = int(default_workers.group(1)) if default_workers else int(environment["MOVECAST_WORKERS"])
    assert "MOVECAST_SOLVER_PROCESSES" in environment, "the light lane is sized by the host's cores otherwise"
    light = int(environment["MOVECAST_SOLVER_PROCESSES"])
    heavy = int(environment.get("MOVECAST_HEAVY_SOLVER_PROCESSES", Settings().heavy_solver_processes))
    heavy_memory = int(environment.get("MOVECAST_HEAVY_MEMORY_BYTES", Settings().heavy_memory_bytes))
    cache = int(environment.get("MOVECAST_ANSWER_CACHE_BYTES", Settings().answer_cache_bytes))
    answers = int(environment.get("MOVECAST_MAX_ANSWER_MEMORY_BYTES", Settings().max_answer_memory_bytes))
    per_worker = heavy * Caps().max_request_memory_bytes + light * heavy_memory + cache + answers + OVERHEAD
    limit = _compose_bytes(service["deploy"]["resources"]["limits"]["memory"])
    assert workers * per_worker + SLACK <= limit, (workers, per_worker, limit)
