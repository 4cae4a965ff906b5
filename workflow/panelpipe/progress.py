"""What ``panelpipe run`` shows of Snakemake's output: one line per step, and errors.

Snakemake writes some twenty lines per job. The full stream goes to a log file in
the run folder; the terminal gets one progress line per finished or failed step
(step, analysis, elapsed time, status) and every panelpipe message in full, so
the message that names the file and line at fault is never hidden.
"""

from __future__ import annotations

import re
import time
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass

__all__ = ["StepProgress"]

# Snakemake 8 and 9 spell the job lines slightly differently; both are read.
_RULE = re.compile(r"^(?:local)?rule (?P<rule>[\w-]+):$")
_ERROR = re.compile(r"^Error in rule (?P<rule>[\w-]+):$")
_JOBID = re.compile(r"^\s+jobid: (?P<job>\d+)\s*$")
_ANALYSIS = re.compile(r"^\s+wildcards:.*\banalysis=(?P<analysis>[^,\s]+)")
_FINISHED = re.compile(r"^Finished (?:jobid: |job )(?P<job>\d+)\b")
# Steps report user errors as "panelpipe: ..." followed by a blank line.
_MESSAGE = "panelpipe:"
# Without a panelpipe message, a failure shows this many of Snakemake's last lines.
TAIL_LINES = 20


@dataclass
class _Job:
    rule: str
    analysis: str
    started: float


class StepProgress:
    """Read Snakemake's output line by line; write the short account of it.

    Parameters
    ----------
    write : callable
        Receives each terminal line (without its newline).
    clock : callable, optional
        Monotonic seconds; replaced in tests.
    """

    def __init__(
        self, write: Callable[[str], object], clock: Callable[[], float] = time.monotonic
    ) -> None:
        self._write = write
        self._clock = clock
        self._jobs: dict[str, _Job] = {}
        self._block: tuple[str, bool] | None = None  # (rule, is an error block)
        self._block_job: str | None = None
        self._in_message = False
        self.messages = 0
        self.failed_steps = 0
        self._tail: deque[str] = deque(maxlen=TAIL_LINES)

    def feed(self, lines: Iterable[str]) -> None:
        """Account for each line of Snakemake's output (newlines are stripped)."""
        for raw in lines:
            self._line(raw.rstrip("\r\n"))

    def _line(self, line: str) -> None:
        self._tail.append(line)
        if self._in_message:
            if line.strip():
                self._write(line)
                return
            self._in_message = False
        if line.startswith(_MESSAGE):
            self._write(line)
            self._in_message = True
            self.messages += 1
            return
        if match := _RULE.match(line):
            self._block, self._block_job = (match["rule"], False), None
        elif match := _ERROR.match(line):
            self._block, self._block_job = (match["rule"], True), None
        elif self._block and (match := _JOBID.match(line)):
            self._block_job = match["job"]
            rule, error = self._block
            if error:
                self._end(self._block_job, "failed")
            else:
                self._jobs[self._block_job] = _Job(rule, "", self._clock())
        elif self._block and (match := _ANALYSIS.match(line)):
            job = self._jobs.get(self._block_job or "")
            if job is not None:
                job.analysis = match["analysis"]
        elif match := _FINISHED.match(line):
            self._end(match["job"], "done")
        elif not line.startswith(" "):
            self._block = None

    def _end(self, job_id: str, status: str) -> None:
        job = self._jobs.pop(job_id, None)
        if job is None or not job.analysis:
            return  # `all` (pointing `latest`) is reported by the JSON lines
        self.failed_steps += status == "failed"
        seconds = self._clock() - job.started
        self._write(f"panelpipe: {job.rule:<9} {job.analysis}  {status} ({seconds:.1f} s)")

    def tail(self) -> list[str]:
        """Snakemake's last lines, for a failure that printed no panelpipe message."""
        return list(self._tail)
