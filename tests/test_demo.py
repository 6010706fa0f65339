"""`sh scripts/demo`, the README's first command: it runs the demo until
Ctrl-C and then says how to put `bandwatch` on the PATH, and what it says
works (README, Two commands).

The script runs for real, in a copy of the checkout's layout, with one part
stood in for: the venv is made by `python -m venv` (its real `activate`
script) and sees this checkout and the test run's libraries through a .pth
file, instead of being filled by pip from the network. Ctrl-C is SIGINT to
the script's process group, as a terminal sends it.
"""

import json
import os
import shutil
import signal
import subprocess
import sys
import sysconfig
import time
from pathlib import Path

from monitor import __version__

ROOT = Path(__file__).resolve().parents[1]

# Stands in for scripts/setup-venv.sh: the console script pip would write.
FAKE_SETUP = """\
# (test stand-in for the real setup: the venv exists, bandwatch is on its path)
"""
CONSOLE_SCRIPT = """\
#!{python}
import sys
from monitor.commands.cli import main
sys.exit(main())
"""


def checkout(tmp_path: Path) -> Path:
    """scripts/demo and config/demo.toml as in the repository, with a venv
    that imports this checkout's `monitor` and the test run's numpy."""
    root = tmp_path / "clone"
    (root / "scripts").mkdir(parents=True)
    (root / "config").mkdir()
    shutil.copy(ROOT / "scripts" / "demo", root / "scripts" / "demo")
    shutil.copy(ROOT / "config" / "demo.toml", root / "config" / "demo.toml")
    (root / "scripts" / "setup-venv.sh").write_text(FAKE_SETUP)
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(root / ".venv")], check=True, timeout=120)
    venv_python = root / ".venv" / "bin" / "python"
    purelib = subprocess.run([str(venv_python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                             stdout=subprocess.PIPE, text=True, check=True).stdout.strip()
    Path(purelib, "bandwatch-test.pth").write_text(f"{ROOT}\n{sysconfig.get_paths()['purelib']}\n")
    script = root / ".venv" / "bin" / "bandwatch"
    script.write_text(CONSOLE_SCRIPT.format(python=venv_python))
    script.chmod(0o755)
    return root


def test_demo_runs_until_ctrl_c_then_says_how_to_use_the_command(tmp_path):
    root = checkout(tmp_path)
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    env["PATH"] = "/usr/bin:/bin"  # no bandwatch on it, as on a fresh machine
    proc = subprocess.Popen(["sh", "scripts/demo"], cwd=str(root), env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        first = proc.stdout.readline()  # the status line: the demo is running
        assert json.loads(first)["payload"]["state"] == "online", first
        time.sleep(0.5)
        os.killpg(proc.pid, signal.SIGINT)  # Ctrl-C
        stdout, stderr = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert proc.returncode == 0, stderr
    assert json.loads(stdout.splitlines()[-1])["payload"]["state"] == "offline"
    activate = f". {root}/.venv/bin/activate"
    assert activate in stderr and "bandwatch view -c config/demo.toml" in stderr
    # What it says works: in a fresh shell, `bandwatch` is found after it.
    shell = subprocess.run(["sh", "-c", f"{activate} && cd {root} && bandwatch --version && "
                            "bandwatch check -c config/demo.toml"], env=env, stdout=subprocess.PIPE,
                           stderr=subprocess.PIPE, text=True, timeout=60)
    assert shell.returncode == 0, shell.stderr
    assert shell.stdout.startswith(f"bandwatch {__version__}\n") and "OK" in shell.stdout
    before = subprocess.run(["sh", "-c", "command -v bandwatch"], env=env, stdout=subprocess.PIPE, timeout=30)
    assert before.returncode != 0  # and not before
