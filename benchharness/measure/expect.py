"""The ``expect:`` section: a run whose exit code or output is wrong has failed.

A fast wrong answer is not a result. ``expect`` states what a correct run
looks like; the runner applies it to every timed and warm-up run:

    expect:
      exit: 0                 # or a list: [0, 3]; default: 0
      stdout: '^checksum 9f2c' # regular expression searched in stdout (re.MULTILINE)
      stderr: '^$'             # ... and in stderr

Regular expressions are Python's `re` syntax, searched (not fully matched) in
the kept tail of each stream (the last ``RunSpec.capture_bytes``, 64 KiB by
default), decoded as UTF-8 with replacement characters.

A regular expression can take exponential time on some text (``(a+)+$`` on a
long line of ``a`` with no match). Every search here, and every metric
pattern (`benchharness.measure.metrics`), is given `REGEX_LIMIT_S` seconds: past that
the run is marked failed with a message naming the expression, and the
harness goes on to the next run instead of hanging outside any timeout.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, replace

from benchharness.execute.base import Measurement

#: Seconds one regular expression may take on one run's output.
REGEX_LIMIT_S = 2.0


class RegexTimeout(Exception):
    """A regular expression ran past `REGEX_LIMIT_S` on one output."""

    def __init__(self, pattern: str, limit_s: float):
        super().__init__(f"the regular expression /{pattern}/ took more than {limit_s:g} s on "
                         "this output (it backtracks without end); simplify it, e.g. no "
                         "nested repeats like (a+)+")
        self.pattern = pattern


def bounded(call, pattern: str, limit_s: float | None = None):
    """``call()`` (a regex search over one text) stopped after ``limit_s`` seconds.

    Python's regular expression engine checks for signals while it matches, so
    in the main thread a one-shot ``SIGALRM`` timer interrupts it; any timer
    already set (a test runner's) is put back with the time it had left. Off
    the main thread (cluster workers) signals cannot be used and the search runs
    in a forked child that is killed at the limit.
    """
    import signal
    import threading
    import time

    limit = REGEX_LIMIT_S if limit_s is None else limit_s
    if threading.current_thread() is not threading.main_thread():
        return _bounded_in_child(call, pattern, limit)

    def on_alarm(_sig, _frame):
        raise RegexTimeout(pattern, limit)

    old_handler = signal.signal(signal.SIGALRM, on_alarm)
    old_delay, old_interval = signal.setitimer(signal.ITIMER_REAL, limit)
    t0 = time.monotonic()
    try:
        return call()
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old_handler)
        if old_delay > 0:
            left = max(old_delay - (time.monotonic() - t0), 1e-3)
            signal.setitimer(signal.ITIMER_REAL, left, old_interval)


def _bounded_in_child(call, pattern: str, limit: float):
    import os
    import pickle
    import select
    import signal

    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:  # pragma: no cover - the child
        try:
            os.close(r)
            res = call()
            data = pickle.dumps(_plain_match(res))
            os.write(w, data)
        finally:
            os._exit(0)
    os.close(w)
    try:
        chunks = []
        poll = select.poll()
        poll.register(r, select.POLLIN | select.POLLHUP)
        import time

        end = time.monotonic() + limit
        while True:
            left = end - time.monotonic()
            if left <= 0 or not poll.poll(left * 1000):
                os.kill(pid, signal.SIGKILL)
                raise RegexTimeout(pattern, limit)
            b = os.read(r, 65536)
            if not b:
                break
            chunks.append(b)
    finally:
        os.close(r)
        os.waitpid(pid, 0)
    return pickle.loads(b"".join(chunks)) if chunks else None


class _Found:
    """A match carried back from a child: its groups."""

    def __init__(self, groups):
        self._groups = groups

    def group(self, i=0):
        return self._groups[i]


def _plain_match(res):
    if res is None:
        return None
    if isinstance(res, list):
        return [_plain_match(m) for m in res]
    if hasattr(res, "group"):
        return _Found([res.group(i) for i in range((res.re.groups if hasattr(res, "re") else 0)
                                                   + 1)])
    return res


@dataclass(frozen=True)
class ExpectSpec:
    exit_codes: tuple[int, ...] = (0,)
    stdout: re.Pattern | None = None
    stderr: re.Pattern | None = None

    def to_json_dict(self) -> dict:
        return {"exit": list(self.exit_codes),
                "stdout": self.stdout.pattern if self.stdout else None,
                "stderr": self.stderr.pattern if self.stderr else None}


def compile_regex(node, what: str) -> re.Pattern:
    from benchharness.experiment import yamlnodes as yn

    text = yn.as_str(node, what)
    try:
        return re.compile(text, re.MULTILINE)
    except re.error as exc:
        raise yn.node_error(node, f"{what} is not a valid regular expression ({exc}); "
                                  "write Python `re` syntax, e.g. 'checksum [0-9a-f]+'") from None


def parse_expect(node) -> ExpectSpec:
    """Validate the ``expect:`` node (errors name FILE:LINE:COL)."""
    from benchharness.experiment import yamlnodes as yn

    fields = yn.expect_mapping(node, "'expect'", {"exit", "stdout", "stderr"})
    codes: tuple[int, ...] = (0,)
    if "exit" in fields:
        n = fields["exit"]
        import yaml

        items = yn.sequence_items(n, "'expect: exit'") if isinstance(n, yaml.SequenceNode) \
            else [n]
        if not items:
            raise yn.node_error(n, "'expect: exit' is an empty list; give at least one code")
        codes = tuple(yn.as_int(i, "'expect: exit'") for i in items)
    return ExpectSpec(
        exit_codes=codes,
        stdout=compile_regex(fields["stdout"], "'expect: stdout'") if "stdout" in fields else None,
        stderr=compile_regex(fields["stderr"], "'expect: stderr'") if "stderr" in fields else None,
    )


def _text(b) -> str:
    if isinstance(b, bytes):
        return b.decode("utf-8", "replace")
    return b or ""


def _snippet(text: str, n: int = 120) -> str:
    t = text.strip().replace("\n", " | ")
    if not t:
        return "it was empty"
    return "it ended with " + repr(t[-n:])


def check_expect(spec: ExpectSpec, m: Measurement) -> tuple[bool, str]:
    """``(ok, reason)``: whether the run's exit code and output are as expected."""
    if m.status == "timeout":
        return False, "timed out"
    if m.exit_code is None:
        return False, m.message or "the command did not start"
    if m.exit_code not in spec.exit_codes:
        want = " or ".join(map(str, spec.exit_codes))
        if m.message:
            # The executor's message carries the stderr tail: keep it, it says why.
            return False, f"{m.message} (expected exit code {want})"
        return False, f"exit code {m.exit_code}, expected {want}"
    for name, pattern, raw in (("stdout", spec.stdout, m.stdout_tail),
                               ("stderr", spec.stderr, m.stderr_tail)):
        if pattern is None:
            continue
        text = _text(raw)
        try:
            found = bounded(lambda: pattern.search(text), pattern.pattern)
        except RegexTimeout as exc:
            return False, f"'expect: {name}': {exc}"
        if not found:
            return False, (f"wrong output: {name} does not match /{pattern.pattern}/ "
                           f"({_snippet(text)})")
    return True, ""


def apply_expect(spec: ExpectSpec | None, m: Measurement) -> Measurement:
    """The measurement with its status decided by ``spec`` (timeouts are left alone).

    A run whose exit code is listed in ``spec`` and whose output matches is
    ``ok`` even if the code is not 0; anything else is ``failed`` with the
    reason in ``message``.
    """
    if spec is None or m.status == "timeout":
        return m
    ok, reason = check_expect(spec, m)
    if ok:
        if m.status == "ok":
            return m
        return replace(m, status="ok", message="")
    if m.status == "failed" and m.exit_code is None:
        return m     # could not start: the executor's message says why
    return replace(m, status="failed", message=reason)
