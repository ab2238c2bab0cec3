"""What the benchmarks that compare against an older revision share: that revision's package."""

from __future__ import annotations

import subprocess
import tarfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def export(rev: str, into: Path) -> Path:
    """The simlab package of git revision ``rev`` under ``into`` (nothing else of the checkout)."""
    into.mkdir(parents=True, exist_ok=True)
    archive = into / "src.tar"
    with open(archive, "wb") as out:
        subprocess.run(["git", "-C", str(ROOT), "archive", rev, "simlab"], stdout=out, check=True)
    with tarfile.open(archive) as tar:
        tar.extractall(into, filter="data")
    return into
