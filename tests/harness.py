"""Test harness: servers started in the background on loopback, in a private Jupyter home.

``launch`` starts ``qcexplore app`` in a process group of its own and ``stop`` ends it by its
process id, with its kernels; ``private_environment`` keeps everything Jupyter writes under a
temporary folder.
"""

from __future__ import annotations

import collections
import os
import queue
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Mapping, Sequence
from pathlib import Path


def private_environment(
    home: str | os.PathLike,
    base: Mapping[str, str] | None = None,
    *,
    python_path: Sequence[str | os.PathLike] = (),
) -> dict[str, str]:
    """An environment in which Jupyter (Voila, JupyterLab, kernels) writes only under ``home``.

    For tests and throw-away servers: ``HOME``, the Jupyter config, data and runtime
    folders and the IPython folder all point into ``home``. ``base``: the environment
    to start from (default: this process's); ``python_path``: folders put first on
    ``PYTHONPATH`` (e.g. a source checkout, so kernels import it).

    Examples
    --------
    >>> env = private_environment("/tmp/h", {})
    >>> env["HOME"], env["JUPYTER_RUNTIME_DIR"], env["JUPYTER_PLATFORM_DIRS"]
    ('/tmp/h', '/tmp/h/runtime', '1')
    """
    home = Path(home)
    env = dict(os.environ if base is None else base)
    env.update(
        HOME=str(home),
        JUPYTER_PLATFORM_DIRS="1",
        JUPYTER_CONFIG_DIR=str(home / "config"),
        JUPYTER_DATA_DIR=str(home / "data"),
        JUPYTER_RUNTIME_DIR=str(home / "runtime"),
        IPYTHONDIR=str(home / "ipython"),
    )
    paths = [str(p) for p in python_path] + [env.get("PYTHONPATH", "")]
    env["PYTHONPATH"] = os.pathsep.join(p for p in paths if p)
    return env


def launch(
    args: Sequence[str] = (),
    *,
    env: Mapping[str, str] | None = None,
    timeout: float = 60.0,
) -> tuple[subprocess.Popen, str]:
    """Start ``qcexplore app ARGS`` in a process group of its own; return it and its address.

    For scripts and tests that need the app in the background. Stop it with
    :func:`stop`, which ends the server and its kernels together.

    Examples
    --------
    """
    command = [sys.executable, "-m", "qcexplore", "app", *args]
    process = subprocess.Popen(
        command,
        env=dict(os.environ if env is None else env),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    )
    lines: queue.Queue[str | None] = queue.Queue()
    errors: collections.deque[str] = collections.deque(maxlen=5)

    def pump() -> None:
        # Keep reading for the server's lifetime so a full pipe never blocks it.
        for line in process.stdout:
            lines.put(line)
        lines.put(None)

    threading.Thread(target=pump, daemon=True).start()
    threading.Thread(target=errors.extend, args=(process.stderr,), daemon=True).start()
    deadline = time.monotonic() + timeout
    while (left := deadline - time.monotonic()) > 0:
        try:
            line = lines.get(timeout=left)
        except queue.Empty:
            break
        if line is None:
            break
        if line.startswith("qcexplore app: http"):
            return process, line.split()[2]
    stop(process)
    last = [e.strip() for e in errors if e.strip()]
    raise RuntimeError(
        f"`{' '.join(command)}` gave no address within {timeout:g} s"
        + (f"; it said: {last[-1]}" if last else "")
    )


def stop(process: subprocess.Popen, *, timeout: float = 20.0) -> int:
    """Stop a server started by :func:`launch` (its whole process group); return its exit code.

    Examples
    --------
    See :func:`launch`.
    """
    if process.poll() is None:
        try:
            os.killpg(process.pid, signal.SIGTERM)
        except ProcessLookupError:
            pass
        try:
            process.wait(timeout)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait(timeout)
    return process.returncode
