"""Deployment files: the compose file parses, the Dockerfile lints, the README's HPC snippet runs."""

from __future__ import annotations

import contextlib
import io
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DOCKERFILE = ROOT / "docker" / "Dockerfile"
COMPOSE = ROOT / "docker" / "compose.yaml"
README = ROOT / "README.md"
IN_CI = bool(os.environ.get("CI"))


def _tool(name: str) -> str | None:
    venv_bin = Path(sys.executable).parent / name
    return str(venv_bin) if venv_bin.exists() else shutil.which(name)


def _need(name: str) -> str:
    path = _tool(name)
    if path is None:
        if IN_CI:
            pytest.fail(f"{name} is required in CI (see .ci/run and the test extras)")
        pytest.skip(f"{name} is not installed")
    return path


def test_compose_config_passes_and_has_the_services():
    exe = _need("docker-compose")
    env = {k: v for k, v in os.environ.items() if not k.startswith("TOPOSCOUT_")}
    res = subprocess.run([exe, "-f", str(COMPOSE), "config"], capture_output=True, text=True, env=env,
                         timeout=120, cwd=ROOT)
    assert res.returncode == 0, res.stderr
    import yaml

    cfg = yaml.safe_load(res.stdout)
    services = cfg["services"]
    assert set(services) == {"api", "scheduler", "worker-1", "worker-2", "db"}
    api = services["api"]["environment"]
    assert api["TOPOSCOUT_DASK_ADDRESS"] == "tcp://scheduler:8786"
    assert api["TOPOSCOUT_DATABASE_URL"].startswith("postgresql+psycopg://toposcout:")
    assert api["TOPOSCOUT_DATABASE_URL"].endswith("@db:5432/toposcout")
    assert services["api"]["depends_on"]["db"]["condition"] == "service_healthy"
    for w in ("worker-1", "worker-2"):
        cmd = services[w]["command"]
        assert cmd[:3] == ["toposcout", "worker", "tcp://scheduler:8786"] and "--memory-limit" in cmd
    assert services["scheduler"]["command"][:2] == ["dask", "scheduler"]
    assert any(v.startswith("pgdata:/var/lib/postgresql/data") for v in services["db"]["volumes"])
    assert {"pgdata", "apidata"} <= set(cfg["volumes"])
    # the environment knobs of the compose file are documented in the README
    knobs = set(re.findall(r"\$\{(TOPOSCOUT_[A-Z_]+)", COMPOSE.read_text()))
    assert knobs and all(k in README.read_text() for k in knobs), knobs


def test_compose_config_rejects_a_broken_file(tmp_path):
    exe = _need("docker-compose")
    bad = tmp_path / "compose.yaml"
    bad.write_text(COMPOSE.read_text().replace("services:", "servicez:", 1))
    res = subprocess.run([exe, "-f", str(bad), "config"], capture_output=True, text=True, timeout=120)
    assert res.returncode != 0


def test_dockerfile_lints_clean():
    exe = _need("hadolint")
    res = subprocess.run([exe, "--no-color", str(DOCKERFILE)], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stdout + res.stderr


def test_dockerfile_essentials():
    text = DOCKERFILE.read_text()
    assert re.search(r"^FROM python:3\.11-slim\b", text, re.M)
    users = re.findall(r"^USER\s+(\S+)", text, re.M)
    assert users and users[-1].split(":")[0] not in ("root", "0")
    assert re.search(r"^HEALTHCHECK .*", text, re.M) and "/healthz" in text
    assert "pip install --no-cache-dir -e ." in text
    assert re.search(r"^COPY topologies ", text, re.M), "topologies/ is read from the checkout"
    assert re.search(r'^CMD \["toposcout", "serve"\]', text, re.M)


def _hpc_snippet() -> str:
    text = README.read_text()
    m = re.search(r"<!-- hpc-snippet -->\s*```python\n(.*?)```", text, re.S)
    assert m, "README has the HPC snippet"
    return m.group(1)


def test_readme_hpc_snippet_builds_the_job_script(monkeypatch):
    pytest.importorskip("dask_jobqueue")
    code = _hpc_snippet()
    before, sep, _after = code.partition("cluster.scale(")
    assert sep, "the snippet scales the cluster (the part that needs SLURM)"
    monkeypatch.setenv("SCHEDULER_HOST", "127.0.0.1")
    monkeypatch.setenv("SCHEDULER_PORT", "0")
    ns: dict = {}
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(before, "README-hpc-snippet", "exec"), ns)
    cluster = ns["cluster"]
    try:
        script = cluster.job_script()
        printed = out.getvalue()
        assert script in printed
        assert "#SBATCH" in script and "--cpus-per-task=4" in script and "#SBATCH --mem=16G" in script
        assert "export OMP_NUM_THREADS=1" in script
        worker_line = next(line for line in script.splitlines() if "distributed.cli.dask_worker" in line)
        assert "--nthreads 1" in worker_line and "--nworkers 4" in worker_line
        assert "--memory-limit 4.00GiB" in worker_line
        assert "--preload toposcout.compiler.study" in worker_line and "--preload toposcout.compiler.metrics" in worker_line
        assert f"export TOPOSCOUT_DASK_ADDRESS={cluster.scheduler_address}" in printed
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
    finally:
        cluster.close()
