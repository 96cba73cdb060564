"""Hooks the tests put inside calib's write transactions (production code has none).

:func:`inside_each_write` calls a function just before each commit of a session that wrote
(flushed rows), i.e. inside the write transaction after its inserts: a test makes it raise
(an interrupted write) or wait (a slowed write). :data:`PAUSED_CLI` runs the command line in
a child process whose every write pauses before its commit, for tests that kill it there.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from sqlalchemy import event
from sqlalchemy.orm import Session, sessionmaker

PAUSE_LINE = "paused inside the write"
"""What the child of :data:`PAUSED_CLI` prints on stderr once it is inside its write."""


@contextmanager
def inside_each_write(
    sessions: sessionmaker[Session] | type[Session], action: Callable[[], None]
) -> Iterator[None]:
    """Run ``action`` before the commit of every transaction of ``sessions`` that wrote."""

    def flushed(session: Session, _context: Any) -> None:
        session.info["wrote"] = True

    def committing(session: Session) -> None:
        if session.info.pop("wrote", False):
            action()

    event.listen(sessions, "after_flush", flushed)
    event.listen(sessions, "before_commit", committing)
    try:
        yield
    finally:
        event.remove(sessions, "before_commit", committing)
        event.remove(sessions, "after_flush", flushed)


PAUSED_CLI = f"""
import sys, time
from sqlalchemy.orm import Session
from tests.hooks import inside_each_write

SECONDS = float(sys.argv.pop(1))

def pause() -> None:
    print({PAUSE_LINE!r}, file=sys.stderr, flush=True)
    time.sleep(SECONDS)

with inside_each_write(Session, pause):
    from calib.cli import main
    sys.argv[0] = "calib"
    main()
"""
"""``python -c PAUSED_CLI SECONDS ARGS...``: ``calib ARGS...``, each write paused SECONDS."""
