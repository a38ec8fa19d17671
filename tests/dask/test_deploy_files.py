"""The Dask deploy files agree with the code: real CLI options, real Dask commands, one address."""

from __future__ import annotations

import re
import shlex
import subprocess
import sys
from pathlib import Path

import yaml

from causeline.cli import _parser

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
SCHEDULER = "tcp://causeline-dask-scheduler:8786"


def _documents(path: Path) -> dict[tuple[str, str], dict]:  # type: ignore[type-arg]
    return {(d["kind"], d["metadata"]["name"]): d for d in yaml.safe_load_all(path.read_text())}


def _options(command: str) -> set[str]:
    """The long options a subcommand of ``causeline`` accepts, from its own parser."""
    subparsers = next(a for a in _parser()._actions if a.dest == "command")
    parser = subparsers.choices[command]  # type: ignore[attr-defined]
    return {o for action in parser._actions for o in action.option_strings if o.startswith("--")}


def _dask_help(command: str) -> str:
    # The options the installed dask CLI (distributed's click commands) really has.
    done = subprocess.run(
        [sys.executable, "-m", "distributed.cli.dask_" + command, "--help"],
        capture_output=True, text=True, timeout=60, check=True,
    )
    return done.stdout


def test_cluster_has_a_scheduler_service_and_workers_that_find_it() -> None:
    docs = _documents(DEPLOY / "dask" / "cluster.yaml")
    scheduler = docs[("Deployment", "causeline-dask-scheduler")]
    service = docs[("Service", "causeline-dask-scheduler")]
    worker = docs[("Deployment", "causeline-dask-worker")]
    assert service["spec"]["selector"] == scheduler["spec"]["selector"]["matchLabels"]
    assert 8786 in {p["port"] for p in service["spec"]["ports"]}
    (scheduler_container,) = scheduler["spec"]["template"]["spec"]["containers"]
    (worker_container,) = worker["spec"]["template"]["spec"]["containers"]
    assert scheduler_container["command"][:2] == ["dask", "scheduler"]
    command = worker_container["command"]
    assert command[:3] == ["dask", "worker", SCHEDULER]
    assert f"tcp://{service['metadata']['name']}:8786" == SCHEDULER
    for container, name in ((scheduler_container, "scheduler"), (worker_container, "worker")):
        flags = {c for c in container["command"] if c.startswith("--")}
        text = _dask_help(name)
        assert all(re.search(rf"^\s+{re.escape(flag)}\b", text, re.M) for flag in flags), flags
    mounts = {m["mountPath"] for m in worker_container["volumeMounts"]}
    assert {"/bundles", "/data"} <= mounts
    for doc in (scheduler, worker):
        assert doc["spec"]["template"]["spec"]["securityContext"]["runAsNonRoot"] is True
        assert doc["spec"]["template"]["spec"]["containers"][0]["image"] == "causeline:latest"


def test_cronjob_runs_rootcause_on_the_cluster_with_the_previous_run() -> None:
    (job,) = yaml.safe_load_all((DEPLOY / "k8s" / "rootcause-cronjob.yaml").read_text())
    assert job["kind"] == "CronJob" and job["apiVersion"] == "batch/v1"
    # Five cron fields (minute hour day month weekday), run once a day.
    minute, hour, day, month, weekday = job["spec"]["schedule"].split()
    assert minute.isdigit() and hour.isdigit() and (day, month, weekday) == ("*", "*", "*")
    spec = job["spec"]["jobTemplate"]["spec"]["template"]["spec"]
    (container,) = spec["containers"]
    script = container["command"][-1]
    words = shlex.split(script.replace("\\\n", " "))
    start = words.index("causeline")
    assert words[start + 1] == "rootcause"
    used = {w for w in words[start:] if w.startswith("--") and w != "--"}  # not `set --`
    assert used <= _options("rootcause"), used - _options("rootcause")
    assert {"--engine", "--scheduler", "--bundle", "--events", "--out", "--previous"} <= used
    assert words[words.index("--engine") + 1] == "dask"
    assert words[words.index("--scheduler") + 1] == SCHEDULER
    # --previous names the folder the last run left, on the volume mounted read-write.
    previous = words[words.index("--previous") + 1]
    mounts = {m["mountPath"]: m for m in container["volumeMounts"]}
    assert previous.startswith("/runs/") and not mounts["/runs"].get("readOnly", False)
    assert f"ln -sfn \"$out\" {previous}" in script
    assert spec["securityContext"]["runAsNonRoot"] is True
    # The job reads the bundle and events where the workers do (same mount paths).
    docs = _documents(DEPLOY / "dask" / "cluster.yaml")
    worker = docs[("Deployment", "causeline-dask-worker")]["spec"]["template"]["spec"]
    worker_mounts = {m["mountPath"] for m in worker["containers"][0]["volumeMounts"]}
    assert {words[words.index("--bundle") + 1].rsplit("/", 1)[0], "/data"} <= worker_mounts


def test_both_commands_take_the_engine_options() -> None:
    for command in ("explain", "rootcause"):
        assert {"--engine", "--scheduler"} <= _options(command)
