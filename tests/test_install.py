"""The install: one import name in the wheel, console scripts immune to a user's own `runtime.py`, and a
device install that runs the runtime without the packer's libraries."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from danpack.pack.build import PackOptions, pack_model

REPO = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent
SHIPPED = REPO / "models_demo" / "shipped" / "sentiment"


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    """The wheel built from a copy of the source (a stale build/ folder in the checkout would leak into it)."""
    source = tmp_path_factory.mktemp("source") / "danpack"
    shutil.copytree(REPO, source, ignore=shutil.ignore_patterns(
        ".git", ".venv", "build", "*.egg-info", "out", "__pycache__", ".hypothesis", ".pytest_cache"))
    out = tmp_path_factory.mktemp("wheel")
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q", "-w", str(out),
                    str(source)], check=True, capture_output=True)
    return next(out.glob("danpack-*.whl"))


@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("bundle") / "sentiment.danpack"
    pack_model(SHIPPED, path, PackOptions())
    return path


def clean_env(**extra: str) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    return {**env, **extra}


def test_wheel_holds_one_top_level_name(wheel):
    with zipfile.ZipFile(wheel) as z:
        names = z.namelist()
        info = next(n for n in names if n.endswith(".dist-info/top_level.txt"))
        assert z.read(info).decode().split() == ["danpack"]
    tops = {n.split("/")[0] for n in names}
    assert tops == {"danpack", next(n.split("/")[0] for n in names if ".dist-info/" in n)}
    assert not [n for n in names if n.startswith(("danpack/bench", "danpack/tests", "bench/", "tests/"))]
    # every job's sub-package and the demo models are in it
    for path in ("danpack/__init__.py", "danpack/runtime/classifier.py", "danpack/pack/build.py", "danpack/check/compare.py",
                 "danpack/convert/from_torch.py", "danpack/cli/__init__.py", "danpack/models_demo/shipped/sentiment/dan.json"):
        assert path in names


def test_console_scripts_ignore_a_projects_own_modules(tmp_path, bundle):
    """A user's project with its own runtime.py / packer.py on the path (PYTHONPATH=.) must not break either CLI."""
    for name in ("runtime", "packer", "models_demo", "bench"):
        (tmp_path / f"{name}.py").write_text(f"raise SystemExit('the project\\'s own {name}.py was imported')\n")
    env = clean_env(PYTHONPATH=".")
    version = subprocess.run([str(BIN / "danpack"), "--version"], cwd=tmp_path, env=env, capture_output=True, text=True)
    assert version.returncode == 0 and version.stdout.startswith("danpack "), version.stderr
    shown = subprocess.run([str(BIN / "danpack"), "inspect", str(bundle)], cwd=tmp_path, env=env, capture_output=True,
                           text=True)
    assert shown.returncode == 0 and "negative, positive" in shown.stdout, shown.stderr
    run = subprocess.run([str(BIN / "danpack-run"), str(bundle), "-"], cwd=tmp_path, env=env, input="quick charge\n",
                         capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    assert json.loads(run.stdout)["label"] in ("negative", "positive")


def test_the_package_imports_nothing_it_does_not_need():
    """`import danpack` and `danpack.runtime.errors` pull in neither numpy nor the packer's libraries."""
    code = ("import sys, danpack, danpack.runtime.errors; "
            "print(sorted(m for m in ('numpy', 'onnx', 'typer', 'onnxruntime') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=clean_env())
    assert done.stdout.strip() == "[]", done.stderr


DEVICE_SCRIPT = """
import json, sys
try:
    import onnx
except ImportError:
    onnx_absent = True
else:
    onnx_absent = False
from danpack import runtime
out = {"onnx_absent": onnx_absent}
for backend in sys.argv[2:]:
    out[backend] = runtime.load(sys.argv[1], backend=backend).predict_proba(["quick charge, friendly staff"]).tolist()
print(json.dumps(out))
"""


def test_device_install_runs_without_the_packer(tmp_path, wheel, bundle):
    """`pip install 'danpack[onnxruntime]'` in a fresh environment: no onnx/typer/safetensors/torch, both backends
    answer as the workstation does, and `danpack` says what to install instead of a traceback."""
    venv = tmp_path / "device"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True)
    python = venv / "bin" / "python"
    install = subprocess.run([str(python), "-m", "pip", "install", "-q", "--disable-pip-version-check",
                              f"{wheel}[onnxruntime]"], capture_output=True, text=True, env=clean_env())
    assert install.returncode == 0, install.stderr[-2000:]
    listed = subprocess.run([str(python), "-m", "pip", "list", "--format=json"], capture_output=True, text=True,
                            check=True)
    installed = {p["name"].lower() for p in json.loads(listed.stdout)}
    assert {"numpy", "msgpack", "onnxruntime", "danpack"} <= installed
    assert not installed & {"onnx", "typer", "safetensors", "torch"}
    done = subprocess.run([str(python), "-c", DEVICE_SCRIPT, str(bundle), "onnxruntime", "numpy"], capture_output=True,
                          text=True, cwd=tmp_path, env=clean_env())
    assert done.returncode == 0, done.stderr
    out = json.loads(done.stdout)
    assert out["onnx_absent"]
    from danpack import runtime

    expected = runtime.load(bundle).predict_proba(["quick charge, friendly staff"])
    for backend in ("onnxruntime", "numpy"):
        assert out[backend][0] == pytest.approx(expected[0].tolist(), abs=1e-6)
    packer = subprocess.run([str(venv / "bin" / "danpack"), "--help"], capture_output=True, text=True, env=clean_env())
    assert packer.returncode == 2 and "pip install 'danpack[packer]'" in packer.stderr
    assert "Traceback" not in packer.stderr
    stream = subprocess.run([str(venv / "bin" / "danpack-run"), str(bundle), "-", "--backend", "numpy"],
                            input="quick charge\n", capture_output=True, text=True, env=clean_env())
    assert stream.returncode == 0 and json.loads(stream.stdout)["label"] in ("negative", "positive"), stream.stderr
