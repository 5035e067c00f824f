"""README's set-up, done as a new user does it, in a fresh virtual environment.

In one new environment: README's first set-up command (``pip install .`` and the
demo run and check), then the install of its second command (``pip install -e
".[test]"``), then ``langsim --help``, an import and a tiny run. This guards a
bug met by a new user: the demo run left numba cache files inside
``site-packages/langsim/kernels/__pycache__``, which survived the switch to the
editable install and shadowed it as a namespace package (``langsim --help``
failed with an ImportError). Compiled code must live in the user cache folder
(langsim/cache.py), never inside the installed package.

Needs the package index (or the wheels pip is configured to find); skipped, with
pip's message, only when pip cannot reach it.
"""
import glob
import os
import re
import shutil
import subprocess
import sys
import textwrap
import time

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
#: pip messages that mean "the index cannot be reached" (not a packaging error of ours).
UNREACHABLE = ("Failed to establish a new connection", "Temporary failure in name resolution",
               "Network is unreachable", "No matching distribution found",
               "Could not fetch URL", "ProxyError", "Max retries exceeded")
#: Seconds any one command may take before the test fails (a hang, not a slow machine).
COMMAND_TIMEOUT = 900
TINY = textwrap.dedent("""\
    seed = 3
    [particles]
    count = 2
    friction = 1e-8
    [medium]
    temperature = 295.15
    [[potential]]
    type = "harmonic"
    stiffness = 1e-6
    [dynamics]
    dt = 1e-5
    steps = 200
    """)


def setup_commands(readme):
    """The shell commands of the fenced blocks of README's "Set up" section, in order."""
    section = re.search(r"^## Set up\n(.*?)^## ", readme, flags=re.S | re.M)
    assert section, "README has no '## Set up' section"
    return [b.strip() for b in re.findall(r"^```\n(.*?)^```", section.group(1), flags=re.S | re.M)]


def copy_checkout(dest):
    """The files a fresh clone has (git's tracked files), else the tree without caches."""
    try:
        files = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True,
                               check=True).stdout.decode().split("\0")
    except (OSError, subprocess.CalledProcessError):
        shutil.copytree(ROOT, dest, ignore=shutil.ignore_patterns(
            ".git", ".venv", ".ci-venv", ".numba-cache", "__pycache__", "*.h5", "*.egg-info"))
        return
    for name in filter(None, files):
        src = os.path.join(ROOT, name)
        if os.path.isfile(src):
            os.makedirs(os.path.dirname(os.path.join(dest, name)), exist_ok=True)
            shutil.copy2(src, os.path.join(dest, name))


def run(command, cwd, env, pip=False):
    t0 = time.perf_counter()
    out = subprocess.run(["bash", "-c", command], cwd=cwd, env=env, capture_output=True,
                         text=True, timeout=COMMAND_TIMEOUT)
    text = out.stdout + out.stderr
    print(f"{time.perf_counter() - t0:6.1f} s  {command}")
    if out.returncode != 0 and pip and any(s in text for s in UNREACHABLE):
        pytest.skip(f"pip cannot reach the package index: {text.strip().splitlines()[-1]}")
    assert out.returncode == 0, f"`{command}` exited with {out.returncode}:\n{text[-4000:]}"
    return out.stdout


@pytest.mark.slow
def test_readme_setup_commands_in_one_fresh_environment(tmp_path):
    with open(os.path.join(ROOT, "README.md"), encoding="utf-8") as fh:
        first, second = setup_commands(fh.read())[:2]
    assert first.startswith("pip install . && "), first
    install_test = second.split(" && ")[0]
    assert install_test == 'pip install -e ".[test]"', second

    src, venv = tmp_path / "checkout", tmp_path / "venv"
    copy_checkout(src)
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=COMMAND_TIMEOUT)
    env = {k: v for k, v in os.environ.items()
           if k not in ("NUMBA_CACHE_DIR", "VIRTUAL_ENV", "PYTHONPATH", "PYTHONHOME")}
    env.update(PATH=f"{venv / 'bin'}{os.pathsep}{env.get('PATH', '')}", VIRTUAL_ENV=str(venv),
               LANGSIM_CACHE_DIR=str(tmp_path / "user-cache"))

    # README command 1: install, demo run, check (split so that only pip's failures may skip)
    install, demo = first.split(" && ", 1)
    run(install, src, env, pip=True)
    run(demo, src, env)
    site = glob.glob(str(venv / "lib" / "python*" / "site-packages" / "langsim"))
    assert site, "pip install . left no langsim in site-packages"
    stray = [p for p in glob.glob(os.path.join(site[0], "**", "*"), recursive=True)
             if p.endswith((".nbi", ".nbc"))]
    assert not stray, f"compiled-code cache written inside the installed package: {stray[:3]}"
    assert glob.glob(str(tmp_path / "user-cache" / "numba" / "*" / "*")), \
        "the demo run cached nothing in the user cache folder"

    # README command 2, its install, in the same environment
    run(install_test, src, env, pip=True)
    assert "run" in run("langsim --help", src, env)
    where = run("python -c 'import langsim; print(langsim.__file__)'", tmp_path, env).strip()
    assert where == str(src / "langsim" / "__init__.py"), where
    (tmp_path / "tiny.toml").write_text(TINY)
    run("langsim run tiny.toml -o tiny.h5 --quiet && langsim info tiny.h5", tmp_path, env)
    assert (tmp_path / "tiny.h5").is_file()
