"""The after-run command: a program the bench file ([after_run] command) or `benchseq run
--after-run` names, started once when a run ends in any state, to tell someone (a message,
a lamp, a page).

It is started as a plain argument list (no shell), with stdin closed and the run's ending in
BENCHSEQ_* environment variables; its output and exit are logged (the run log gets them),
and it is ended, with anything it started in its own process group, after its time limit.
Whatever it does, the result file and the run's exit code stay as they are."""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import subprocess
from collections.abc import Mapping, Sequence

DEFAULT_TIMEOUT_S = 60.0
MAX_TIMEOUT_S = 600.0
MAX_OUTPUT_LINES = 200  # of its output, the last lines are logged

log = logging.getLogger("benchseq.afterrun")


def ending_environment(
    *,
    result: str,
    status: str,
    verdict: str,
    exit_code: int,
    reason: str = "",
    not_safe: Sequence[str] = (),
    run_log: str = "",
) -> dict[str, str]:
    """The BENCHSEQ_* variables the command is given."""
    return {
        "BENCHSEQ_RESULT": result,
        "BENCHSEQ_STATUS": status,
        "BENCHSEQ_VERDICT": verdict,
        "BENCHSEQ_EXIT_CODE": str(exit_code),
        "BENCHSEQ_REASON": reason,
        "BENCHSEQ_NOT_SAFE": "; ".join(not_safe),
        "BENCHSEQ_RUN_LOG": run_log,
    }


def run_after_command(
    argv: Sequence[str], variables: Mapping[str, str], timeout_s: float = DEFAULT_TIMEOUT_S
) -> int | None:
    """Run ``argv`` with ``variables`` added to the environment, at most ``timeout_s``.

    Returns its exit code (None when it could not start or was ended at its limit); never
    raises for the command's own failure, which is logged as a warning."""
    shown = argv[0] if argv else "(none)"
    posix = os.name == "posix"
    try:
        proc = subprocess.Popen(
            list(argv),
            stdin=subprocess.DEVNULL,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            env={**os.environ, **variables},
            start_new_session=posix,
        )
    except OSError as exc:
        log.warning("the after-run command %s could not be started: %s", shown, exc)
        return None
    timed_out = False
    try:
        output, _ = proc.communicate(timeout=timeout_s)
    except subprocess.TimeoutExpired:
        timed_out = True
        _end(proc, posix)
        try:
            output, _ = proc.communicate(timeout=5.0)
        except subprocess.TimeoutExpired:  # something it started still holds the pipe
            output = b""
    lines = (output or b"").decode("utf-8", errors="replace").splitlines()
    for line in lines[-MAX_OUTPUT_LINES:]:
        log.info("after-run: %s", line)
    if timed_out:
        log.warning(
            "the after-run command %s did not finish within %g s and was ended", shown, timeout_s
        )
        return None
    if proc.returncode != 0:
        log.warning("the after-run command %s exited with code %d", shown, proc.returncode)
    else:
        log.info("the after-run command %s finished", shown)
    return proc.returncode


def _end(proc: subprocess.Popen[bytes], posix: bool) -> None:
    """End the command we started (and, on POSIX, its own process group)."""
    with contextlib.suppress(OSError):
        if posix:
            os.killpg(proc.pid, signal.SIGKILL)
        else:
            proc.kill()
    with contextlib.suppress(subprocess.TimeoutExpired):
        proc.wait(timeout=5.0)
