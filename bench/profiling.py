"""Optional sampling profiles of the measured processes (``python -m bench --profile
DIR``): py-spy (``pip install py-spy``) records each real phase's server process and its
workers, then the stacks are summed into a short text summary beside the raw file.

py-spy's raw format is one line per distinct stack: ``frame;frame;...;frame count``,
outermost frame first.
"""

from __future__ import annotations

import shutil
import signal
import subprocess
import sys
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

#: Where profiles go; None (the default) records nothing.
DIR: Path | None = None
RATE = 100


@contextmanager
def record(pid: int, name: str, *, idle: bool = False) -> Iterator[None]:
    """Sample ``pid`` and its subprocesses while the block runs (if profiling is on)."""
    spy = shutil.which("py-spy") or shutil.which("py-spy", path=str(Path(sys.executable).parent))
    if DIR is None or spy is None:
        yield
        return
    DIR.mkdir(parents=True, exist_ok=True)
    raw = DIR / f"{name}.txt"
    args = [spy, "record", "--pid", str(pid), "--rate", str(RATE), "--format", "raw"]
    args += ["--subprocesses", "--output", str(raw)] + (["--idle"] if idle else [])
    proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)  # noqa: S603
    try:
        yield
    finally:
        proc.send_signal(signal.SIGINT)  # py-spy writes its output on SIGINT
        try:
            proc.wait(30)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(5)
        if raw.exists():
            (DIR / f"{name}.summary.txt").write_text(summarize(raw))


def summarize(raw: Path, top: int = 30) -> str:
    """Self time by innermost frame, and inclusive time of keystrata's own frames, as
    shares of all samples."""
    total = 0
    own: Counter[str] = Counter()
    inclusive: Counter[str] = Counter()
    for line in raw.read_text().splitlines():
        stack, _, count = line.rpartition(" ")
        if not stack or not count.isdigit():
            continue
        n = int(count)
        total += n
        frames = stack.split(";")
        own[frames[-1]] += n
        for frame in set(frames):
            inclusive[frame] += n
    if not total:
        return "no samples\n"
    lines = [f"{total} samples", "", "self time (innermost frame):"]
    lines += [f"  {v / total:6.1%}  {k}" for k, v in own.most_common(top)]
    lines += ["", "inclusive time of keystrata frames:"]
    ours = [(k, v) for k, v in inclusive.most_common() if "keystrata/" in k]
    lines += [f"  {v / total:6.1%}  {k}" for k, v in ours[:top]]
    return "\n".join(lines) + "\n"
