"""The README's commands, run from an installed package in a fresh environment."""

from __future__ import annotations

import re
import site
import subprocess
import venv
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text()


def quick_start() -> list[str]:
    block = re.search(r"## Quick start.*?```(?:bash|sh)?\n(.*?)```", README, re.S)
    assert block, "the README has a Quick start with a code block"
    return [line for line in block.group(1).splitlines() if line and not line.startswith("#")]


def test_quick_start_is_two_commands() -> None:
    main_job, tests = quick_start()
    assert "pip install ." in main_job and main_job.endswith("priorledger demo")
    assert '".[test]"' in tests and tests.endswith("pytest")


@pytest.fixture(scope="module")
def installed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A fresh virtual environment with the project installed from the source, not editable.

    The dependencies come from this interpreter's site-packages (a path file, so none of
    its own path hooks run); the project itself comes from a real, non-editable install.
    """
    where = tmp_path_factory.mktemp("venv")
    venv.create(where, with_pip=True)
    python = where / "bin" / "python"
    own = subprocess.run(
        [python, "-c", "import site; print(site.getsitepackages()[0])"],
        capture_output=True,
        text=True,
        check=True,
    ).stdout.strip()
    Path(own, "dependencies.pth").write_text("\n".join(site.getsitepackages()) + "\n")
    subprocess.run(
        [python, "-m", "pip", "install", "--quiet", "--no-deps", str(ROOT)],
        check=True,
        capture_output=True,
        cwd=where,
    )
    return where


def test_main_job_runs_from_the_installed_package(installed: Path, tmp_path: Path) -> None:
    python = installed / "bin" / "python"
    where = subprocess.run(
        [python, "-c", "import registry; print(registry.__file__)"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        check=True,
    ).stdout
    assert str(ROOT) not in where and "site-packages" in where
    main_job = quick_start()[0].split("&&")[-1].split()
    done = subprocess.run(
        [installed / "bin" / main_job[0], *main_job[1:], "--db", tmp_path / "demo.db"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PATH": f"{installed / 'bin'}:/usr/bin:/bin", "NO_COLOR": "1"},
        timeout=600,
    )
    assert done.returncode == 0, done.stderr
    assert "INVENTED" in done.stdout and "entries" in done.stdout
    assert "Traceback" not in done.stderr
