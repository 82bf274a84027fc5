"""The WSGI entry that gunicorn serves: ``gunicorn 'service.wsgi:create_app()'``."""

import os
import queue
import sys

from service.app import create_app as _create_app

#: Environment: valuations (POST requests) one worker process runs at once (default 3;
#: 0 means no limit).
VALUATIONS_PER_WORKER = "ANNUITY_VALUATIONS_PER_WORKER"


class ValuationSlots:
    """Let at most ``slots`` POST requests run the app at once in this process; the rest wait.

    Gunicorn's threaded workers give each worker a few threads so that health checks and
    metrics are answered while a long valuation runs. The slots keep valuations themselves
    to one (by default) per worker, as many as with one thread per worker, so the threads
    add no CPU or memory contention. GET requests (health, metrics, bases, the contract)
    never wait for a slot.
    """

    def __init__(self, app, slots: int):
        self.app = app
        self.slots = Slots(slots)

    def __call__(self, environ, start_response):
        if environ.get("REQUEST_METHOD") != "POST":
            return self.app(environ, start_response)
        tokens = self.slots.tokens
        tokens.get()
        try:
            # Flask builds the whole response before returning it: the valuation is done
            # when this call returns, and sending the bytes needs no slot.
            return self.app(environ, start_response)
        finally:
            tokens.put(None)


class Slots:
    """A counting semaphore held as a queue of tokens: taking and giving back a slot are
    one C call each (threading.Semaphore takes a Python-level condition for each)."""

    def __init__(self, slots: int):
        self.tokens = queue.SimpleQueue()
        for _ in range(slots):
            self.tokens.put(None)

    def acquire(self, blocking: bool = True) -> bool:
        try:
            self.tokens.get(block=blocking)
        except queue.Empty:
            return False
        return True

    def release(self) -> None:
        self.tokens.put(None)


def create_app(config: dict | None = None):
    """Build the app; stop with a clear message when the tables folder cannot be read."""
    try:
        app = _create_app(config)
    except OSError as exc:
        print(f"annuity-factor-service: cannot start: {exc}", file=sys.stderr, flush=True)
        raise SystemExit(2) from None
    slots = int(os.environ.get(VALUATIONS_PER_WORKER, "3"))
    if slots > 0:
        app.wsgi_app = ValuationSlots(app.wsgi_app, slots)
    return app
