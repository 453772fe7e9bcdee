"""The built wheel holds every package and data file, and both entry points show the cautions.

The wheel is built from a copy of the sources in a temporary folder, so the shared working
tree gets no build/ or egg-info changes. When the environment's setuptools satisfies the
project's ``[build-system] requires`` the build runs with ``--no-isolation`` (offline,
fast); otherwise ``python -m build`` makes its usual isolated build environment from the
configured package index.
"""

from __future__ import annotations

import importlib.metadata
import os
import re
import shutil
import subprocess
import sys
import sysconfig
import tomllib
import zipfile
from pathlib import Path

import pytest
from packaging.requirements import Requirement

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
PACKAGE_DIRS: dict[str, str] = PYPROJECT["tool"]["setuptools"]["package-dir"]
BUILD_TIMEOUT_S = 120
RUN_TIMEOUT_S = 60

# The cautions every --help must carry (DEVELOPERS.md "Safety" house rule; the wording is
# ours, the topics are common practice, no published source).
CAUTION_PHRASES = [
    "hazardous",
    "current limits",
    "before enabling outputs",
    "authorisation",
    "local codes",
    "licensed practice",
    "software limits never replace hardware protection",
]


def _setuptools_is_enough() -> bool:
    for text in PYPROJECT["build-system"]["requires"]:
        req = Requirement(text)
        try:
            have = importlib.metadata.version(req.name)
        except importlib.metadata.PackageNotFoundError:
            return False
        if not req.specifier.contains(have, prereleases=True):
            return False
    return True


def _copy_sources(dest: Path) -> None:
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", "*.egg-info", "build")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, dest / name)
    for folder in sorted(set(PACKAGE_DIRS.values())):
        shutil.copytree(ROOT / folder, dest / folder, ignore=ignore)


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    src = tmp_path_factory.mktemp("src")
    out = tmp_path_factory.mktemp("dist")
    _copy_sources(src)
    cmd = [sys.executable, "-m", "build", "--wheel", "--outdir", str(out)]
    if _setuptools_is_enough():
        cmd.insert(4, "--no-isolation")
    proc = subprocess.run(cmd, cwd=src, capture_output=True, text=True, timeout=BUILD_TIMEOUT_S)
    assert proc.returncode == 0, f"wheel build failed: {' '.join(cmd)}\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}"
    wheels = list(out.glob("benchctl-*.whl"))
    assert len(wheels) == 1, wheels
    return wheels[0]


def _names(wheel: Path) -> set[str]:
    with zipfile.ZipFile(wheel) as zf:
        return set(zf.namelist())


def _source_files(pattern: str) -> dict[str, Path]:
    """Map wheel path -> source file for every file matching ``pattern`` in each package dir."""
    found: dict[str, Path] = {}
    for package, folder in PACKAGE_DIRS.items():
        base = ROOT / folder
        prefix = package.replace(".", "/")
        for path in base.rglob(pattern):
            rel = path.relative_to(base)
            if "__pycache__" in rel.parts:
                continue
            # Sub-packages mapped elsewhere (benchctl.drivers -> drivers/) are listed
            # under their own entry; inside benchctl/ nothing is mapped away.
            found[f"{prefix}/{rel.as_posix()}"] = path
    return found


def test_wheel_holds_the_packages(wheel: Path) -> None:
    names = _names(wheel)
    for package in ("benchctl", "benchctl.scpi", "benchctl.drivers", "benchctl.procedures",
                    "benchctl.simulated"):
        assert f"{package.replace('.', '/')}/__init__.py" in names, package
    assert "benchctl/py.typed" in names
    # Nothing generic lands in site-packages: the only top-level names are ours.
    tops = {n.split("/")[0] for n in names}
    assert tops == {"benchctl", f"benchctl-{PYPROJECT['project']['version']}.dist-info"}, tops


def test_wheel_holds_every_module(wheel: Path) -> None:
    names = _names(wheel)
    missing = sorted(set(_source_files("*.py")) - names)
    assert not missing, f"modules left out of the wheel (add their packages?): {missing}"


@pytest.mark.parametrize(("folder", "pattern"), [
    ("drivers/dialects", "*.toml"),
    ("simulated/boards", "*.toml"),
    ("simulated/boards", "*.csv"),
])
def test_wheel_holds_the_data_files(wheel: Path, folder: str, pattern: str) -> None:
    # Whatever data files exist now must be packaged (none yet is not a failure).
    names = _names(wheel)
    package = next(p for p, f in PACKAGE_DIRS.items() if f == folder.split("/")[0])
    sub = folder.split("/", 1)[1]
    for path in sorted((ROOT / folder).glob(pattern)):
        inside = f"{package.replace('.', '/')}/{sub}/{path.name}"
        assert inside in names, f"{path.relative_to(ROOT)} is not in the wheel"
        with zipfile.ZipFile(wheel) as zf:
            assert zf.read(inside) == path.read_bytes(), inside


def test_wheel_metadata_declares_the_console_script(wheel: Path) -> None:
    with zipfile.ZipFile(wheel) as zf:
        dist = next(n for n in zf.namelist() if n.endswith(".dist-info/entry_points.txt"))
        entry_points = zf.read(dist).decode()
    assert re.search(r"^\[console_scripts\]\s*$", entry_points, re.M)
    assert re.search(r"^benchctl\s*=\s*benchctl\.cli:main\s*$", entry_points, re.M)


def test_installed_wheel_imports_and_finds_its_data(wheel: Path, tmp_path: Path) -> None:
    target = tmp_path / "site"
    proc = subprocess.run(
        [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-index",
         "--target", str(target), str(wheel)],
        capture_output=True, text=True, timeout=BUILD_TIMEOUT_S,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    # -S: no site processing, so the editable install of the working tree is not seen;
    # the environment's site-packages come after the unpacked wheel for numpy & co.
    site = sysconfig.get_paths()["purelib"]
    probe = (
        "import importlib.resources as r, benchctl, benchctl.scpi, benchctl.drivers, "
        "benchctl.procedures, benchctl.simulated\n"
        "print(benchctl.__file__)\n"
        "print(','.join(sorted(p.name for p in r.files('benchctl.drivers').joinpath("
        "'dialects').iterdir() if p.name.endswith('.toml'))))\n"
    )
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(target), site])}
    run = subprocess.run([sys.executable, "-S", "-c", probe], capture_output=True, text=True,
                         timeout=RUN_TIMEOUT_S, env=env, cwd=tmp_path)
    assert run.returncode == 0, run.stderr[-2000:]
    where, dialects = run.stdout.splitlines()[:2]
    assert Path(where).is_relative_to(target), where
    expected = sorted(p.name for p in (ROOT / "drivers" / "dialects").glob("*.toml"))
    assert (dialects.split(",") if dialects else []) == expected


def _help_text(cmd: list[str]) -> str:
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=RUN_TIMEOUT_S,
                          cwd=ROOT, env={**os.environ, "COLUMNS": "100"})
    assert proc.returncode == 0, f"{cmd} exited {proc.returncode}: {proc.stderr[-2000:]}"
    return " ".join(proc.stdout.split()).lower()


def _check_cautions(text: str) -> None:
    assert "usage: benchctl" in text
    for phrase in CAUTION_PHRASES:
        assert phrase in text, f"--help lacks the caution {phrase!r}"


def test_python_m_benchctl_help_shows_cautions() -> None:
    _check_cautions(_help_text([sys.executable, "-m", "benchctl", "--help"]))


def test_console_script_help_shows_cautions() -> None:
    script = Path(sys.executable).parent / "benchctl"
    found = str(script) if script.exists() else shutil.which("benchctl")
    assert found, "the benchctl console script is not installed in this environment"
    _check_cautions(_help_text([found, "--help"]))


def test_the_benchmark_runner_refuses_an_unknown_name_and_runs_nothing(capsys, monkeypatch) -> None:
    monkeypatch.syspath_prepend(str(ROOT))
    from benchmarks.__main__ import main

    assert main(["bench_no_such_thing"]) == 2
    out, err = capsys.readouterr()
    assert "no such benchmark: bench_no_such_thing" in err and "===" not in out
