"""Running simlab's command line in a subprocess, as a user would, for the integration tests."""

import subprocess
import sys

# A one-input, two-policy study small enough for every command in seconds (with a sweep grid).
SMALL = """
[study]
name = "safe-small"
replicates = 2
seed = 1
[space]
dose = [0.0, 1.0]
[world]
lengthscale = 0.2
amplitude = 1.0
noise = 0.05
[campaign]
initial = 2
budgets = [4, 6]
pool = 128
[target]
regret = 0.1
[sweep]
lengthscale = [1.0]
amplitude = [1.0, 2.0]
replicates = 2
[[policy]]
rule = "ei"
[[policy]]
rule = "random"
"""


def simlab(*args, cwd, timeout=300):
    """``python -m simlab ARGS`` in ``cwd``, output captured as text."""
    return subprocess.run([sys.executable, "-m", "simlab", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, timeout=timeout)


def run_study(folder, text, out="r"):
    """Write ``text`` as ``folder/s.toml`` and run it into ``folder/out`` (quiet); the run must succeed."""
    (folder / "s.toml").write_text(text)
    done = simlab("run", "s.toml", "--out", out, "--quiet", cwd=folder)
    assert done.returncode == 0, done.stderr
    return folder / out


def one_line(out, code=2):
    """The run ended with ``code`` and exactly one line on standard error, no traceback."""
    lines = [line for line in out.stderr.splitlines() if line.strip()]
    assert out.returncode == code, out.stderr
    assert len(lines) == 1 and "Traceback" not in out.stderr, out.stderr
    return lines[0]
