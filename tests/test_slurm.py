"""The workflow on a real SLURM cluster: a single node on localhost (tests/cluster/start.sh), driven
through Snakemake's SLURM executor with config/profiles/slurm, must give the same results as a
local `--cores 2` run of the same inputs, with every job a SLURM job of this run.

Opt-in: runs only with RINGID_TEST_SLURM=1 in the environment (.ci/run sets it), since it installs
the Debian packages slurmctld, slurmd, slurm-client and munge when missing and starts their daemons.
Needs root (slurmd runs jobs as root) and the executor plugin from the `test` extra; skipped otherwise.
"""

import csv
import json
import math
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conftest import REFERENCE_PHASES, ROOT, write_sheet

pytestmark = pytest.mark.slow

CLUSTER_SCRIPTS = ROOT / "tests" / "cluster"
SLURM_PROFILE = ROOT / "config" / "profiles" / "slurm"
LOCAL_PROFILE = ROOT / "config" / "profiles" / "local"
# The test installs Debian packages and starts daemons: it runs only when this is set to 1.
OPT_IN = "RINGID_TEST_SLURM"
# start.sh's exit status for "this machine cannot run the cluster".
CANNOT_RUN_CLUSTER = 77

# Three patterns of different kinds: one phase in a film, nanoparticles, two phases.
SAMPLES = ("film_anneal_400C", "np_CeO2_batch_B", "np_Ni_NiO_core_shell")
GROUP_BATCHES = 2  # batches per SLURM job in the test (the profile's default is 1)
# The phases of those samples, the calibration standard (Au) and a few that must not be chosen;
# a small library keeps the test short (the shipped one adds ~4 s of job start per CIF on SLURM).
PHASES = ("Au", "TiO2_anatase", "TiO2_rutile", "CeO2", "Ni", "NiO", "ZnO", "Cu")

# Wall-time bounds (s). Measured on 2 cores: local run ~30 s, SLURM run ~160 s.
LOCAL_TIMEOUT_S = 180
SLURM_TIMEOUT_S = 420
# After the timeout's SIGINT, Snakemake has this long to cancel its SLURM jobs before SIGKILL.
KILL_AFTER_S = 60


def snakemake_command(timeout_s, *args):
    """`snakemake ARGS` under `timeout`: SIGINT at timeout_s (Snakemake then cancels its SLURM
    jobs; SIGTERM would leave them running), SIGKILL KILL_AFTER_S later."""
    return ["timeout", "--foreground", "-s", "INT", "-k", str(KILL_AFTER_S), str(timeout_s),
            sys.executable, "-m", "snakemake", *args]


def run_logged(cmd, log_path, env, timeout_s):
    """Run cmd from the repository (the Snakefile's relative paths), output to log_path; the
    elapsed wall time in s and the log text."""
    start = time.monotonic()
    with open(log_path, "w") as log:
        res = subprocess.run(cmd, cwd=ROOT, env=env, stdin=subprocess.DEVNULL, stdout=log,
                             stderr=subprocess.STDOUT, timeout=timeout_s + KILL_AFTER_S + 30)
    elapsed_s = time.monotonic() - start
    text = Path(log_path).read_text()
    if res.returncode != 0:
        why = "timed out" if res.returncode == 124 else f"exit status {res.returncode}"
        raise AssertionError(f"{' '.join(cmd[7:])}: {why}; log {log_path}:\n{text[-4000:]}")
    return elapsed_s, text


def tool_env():
    """This interpreter's folder first on PATH, so that jobs find `ringid` and the same Python."""
    return dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))


def pid_running(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


@pytest.fixture(scope="module")
def slurm_cluster(tmp_path_factory):
    """A single-node SLURM cluster on localhost; its environment (SLURM_CONF). Stops exactly the
    daemons start.sh started (jobs left over are cancelled first) and checks that they are gone."""
    if os.environ.get(OPT_IN) != "1":
        pytest.skip(f"the real-SLURM test installs and starts SLURM daemons: opt in with {OPT_IN}=1 (.ci/run does)")
    if os.geteuid() != 0:
        pytest.skip("the localhost SLURM cluster needs root (slurmd runs the jobs as root)")
    pytest.importorskip("snakemake_executor_plugin_slurm",
                        reason="snakemake-executor-plugin-slurm is not installed (pip install -e '.[test]')")
    if shutil.which("timeout") is None:
        pytest.skip("coreutils `timeout` is not on PATH")
    state = tmp_path_factory.mktemp("slurm_state")
    started = subprocess.run(["bash", str(CLUSTER_SCRIPTS / "start.sh"), str(state)], capture_output=True,
                             text=True, timeout=300, stdin=subprocess.DEVNULL)
    if started.returncode == CANNOT_RUN_CLUSTER:
        pytest.skip(f"no localhost SLURM cluster: {started.stderr.strip().splitlines()[-1]}")
    assert started.returncode == 0, f"tests/cluster/start.sh failed:\n{started.stderr[-3000:]}"
    daemons = {}
    for line in (state / "pids").read_text().splitlines():
        name, value = line.split()
        if value.isdigit():
            daemons[name] = int(value)
    env = tool_env()
    for line in (state / "env").read_text().splitlines():
        key, value = line.removeprefix("export ").split("=", 1)
        env[key] = value
    try:
        yield {"env": env, "state": state, "daemons": daemons}
    finally:
        stopped = subprocess.run(["bash", str(CLUSTER_SCRIPTS / "stop.sh"), str(state)], capture_output=True,
                                 text=True, timeout=120, stdin=subprocess.DEVNULL)
        still_running = [f"{name} ({pid})" for name, pid in daemons.items() if pid_running(pid)]
        assert stopped.returncode == 0, f"tests/cluster/stop.sh failed:\n{stopped.stderr[-3000:]}"
        assert not still_running, f"still running after stop.sh: {', '.join(still_running)}"


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """The synthetic demo written by `ringid demo`, cut to SAMPLES, and a library of PHASES."""
    base = tmp_path_factory.mktemp("slurm_inputs")
    demo = base / "demo"
    subprocess.run([sys.executable, "-m", "ringid.cli", "demo", str(demo), "--size-px", "256", "--quiet"],
                   check=True, env=tool_env(), timeout=300)
    with open(demo / "samples.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    subset = [row for row in rows if row["sample"] in SAMPLES]
    assert sorted(row["sample"] for row in subset) == sorted(SAMPLES)
    # Image paths are relative to the sheet's folder: the cut sheet lives beside the original.
    write_sheet(demo / "subset.csv", subset, fieldnames=list(rows[0]))
    phases = base / "phases"
    phases.mkdir()
    for phase in PHASES:
        shutil.copy(REFERENCE_PHASES / f"{phase}.cif", phases / f"{phase}.cif")
    # batch_size 1: a batch per sample, so the grouping of batches into SLURM jobs is seen
    return {"base": base, "config": [f"samples={demo / 'subset.csv'}",
                                     f"calibrations={demo / 'calibrations.csv'}", f"phases_dir={phases}",
                                     "batch_size=1"]}


def without_key(path, key):
    record = json.loads(Path(path).read_text())
    record.pop(key, None)
    return record


def profile_group_components():
    """{group: components per job} from the SLURM profile."""
    import yaml

    profile = yaml.safe_load((SLURM_PROFILE / "config.yaml").read_text())
    return {name: int(n) for name, n in (item.split("=") for item in profile["group-components"])}


def test_workflow_on_slurm_equals_local_run(slurm_cluster, inputs, tmp_path):
    env = slurm_cluster["env"]
    local_results, slurm_results = tmp_path / "local", tmp_path / "slurm"

    local_s, _ = run_logged(
        snakemake_command(LOCAL_TIMEOUT_S, "--profile", str(LOCAL_PROFILE), "--cores", "2",
                          "--config", *inputs["config"], f"results_dir={local_results}"),
        tmp_path / "local.log", tool_env(), LOCAL_TIMEOUT_S)

    # The test cluster has no accounting database, so job states come from squeue (sacct would
    # fail and the executor would wait forever); MinJobAge=300 s keeps finished jobs listed.
    slurm_s, log = run_logged(
        snakemake_command(SLURM_TIMEOUT_S, "--profile", str(SLURM_PROFILE), "--slurm-status-command", "squeue",
                          "--group-components", f"per_batch={GROUP_BATCHES}", "library=10",
                          "--slurm-logdir", str(tmp_path / "slurm_logs"), "--slurm-keep-successful-logs",
                          "--config", *inputs["config"], f"results_dir={slurm_results}"),
        tmp_path / "slurm.log", env, SLURM_TIMEOUT_S)
    print(f"local --cores 2: {local_s:.0f} s; SLURM executor: {slurm_s:.0f} s")

    # Every job the executor submitted is a SLURM job named by this run's id, and finished.
    run_id = re.search(r"SLURM run ID: (\S+)", log).group(1)
    submitted = set(re.findall(r"has been submitted with SLURM jobid (\d+)", log))
    assert submitted, f"no job was submitted to SLURM:\n{log[-3000:]}"
    listed = subprocess.run(["squeue", "-h", "-t", "all", "--name", run_id, "-o", "%i|%T|%k|%B"],
                            capture_output=True, text=True, env=env, timeout=30, check=True).stdout
    jobs = {jobid: (state, comment, host) for jobid, state, comment, host in
            (line.split("|") for line in listed.splitlines())}
    assert set(jobs) == submitted, f"run {run_id}: squeue lists {sorted(jobs)}, the log {sorted(submitted)}"
    assert {state for state, _, _ in jobs.values()} == {"COMPLETED"}, jobs
    node = subprocess.run(["sinfo", "-h", "-o", "%N"], capture_output=True, text=True, env=env,
                          timeout=30, check=True).stdout.strip()
    assert {host for _, _, host in jobs.values()} == {node}, jobs

    # The cheap jobs went as groups: a batch's image and identification jobs, GROUP_BATCHES batches
    # to a SLURM job; the per-CIF library jobs as the profile says.
    components = profile_group_components()
    comments = [comment for _, comment, _ in jobs.values()]
    assert sum(c.startswith("rule_per_batch_") for c in comments) == math.ceil(len(SAMPLES) / GROUP_BATCHES)
    assert sum(c.startswith("rule_library_library_phase") for c in comments) == math.ceil(
        len(PHASES) / components["library"]
    )
    assert not any(c.startswith(("rule_measure", "rule_identify", "rule_library_phase")) for c in comments), comments
    for rule in ("calibration", "library_index", "report"):
        assert sum(c.startswith(f"rule_{rule}") for c in comments) == 1, comments

    # Same results as the local run: CSVs byte for byte; sample.json apart from its timings;
    # identification.json apart from provenance (it names the results folder).
    def relative(folder, pattern):
        return sorted(p.relative_to(folder) for p in folder.glob(pattern))

    csvs = ["summary.csv"] + [str(p) for p in relative(local_results, "samples/*/*.csv")]
    assert relative(slurm_results, "samples/*/*.csv") == relative(local_results, "samples/*/*.csv")
    for sample in SAMPLES:
        for name in ("rings.csv", "phases.csv"):
            assert f"samples/{sample}/{name}" in csvs
    for name in csvs:
        assert (slurm_results / name).read_bytes() == (local_results / name).read_bytes(), name
    for sample in SAMPLES:
        folder = Path("samples") / sample
        assert without_key(slurm_results / folder / "sample.json", "timings_s") == \
            without_key(local_results / folder / "sample.json", "timings_s"), sample
        assert without_key(slurm_results / folder / "identification.json", "provenance") == \
            without_key(local_results / folder / "identification.json", "provenance"), sample
