"""The valuation slots around the app: at most N POST requests run at once in a worker, and
GET requests (health probes among them) never wait for one."""

import threading

from service.wsgi import ValuationSlots


class _Blocking:
    """A WSGI app whose POSTs wait until released, counting how many run at once."""

    def __init__(self):
        self.release = threading.Event()
        self.lock = threading.Lock()
        self.running = 0
        self.most = 0
        self.entered = threading.Semaphore(0)

    def __call__(self, environ, start_response):
        if environ["REQUEST_METHOD"] == "POST":
            with self.lock:
                self.running += 1
                self.most = max(self.most, self.running)
            self.entered.release()
            self.release.wait(10)
            with self.lock:
                self.running -= 1
        start_response("200 OK", [("Content-Type", "text/plain")])
        return [b"ok"]


def _call(app, method):
    return b"".join(app({"REQUEST_METHOD": method}, lambda status, headers: None))


def test_posts_wait_for_a_slot_and_gets_never_do():
    inner = _Blocking()
    app = ValuationSlots(inner, 2)
    posts = [threading.Thread(target=_call, args=(app, "POST")) for _ in range(5)]
    for t in posts:
        t.start()
    assert inner.entered.acquire(timeout=5) and inner.entered.acquire(timeout=5)
    # Two valuations run; three wait; a GET goes straight through meanwhile.
    assert not inner.entered.acquire(timeout=0.3)
    assert inner.running == 2
    assert _call(app, "GET") == b"ok"
    inner.release.set()
    for t in posts:
        t.join(timeout=10)
    assert inner.most == 2
    # Every slot is given back.
    assert all(app.slots.acquire(blocking=False) for _ in range(2))


def test_factory_applies_the_configured_slots(monkeypatch):
    from service.wsgi import VALUATIONS_PER_WORKER, create_app

    monkeypatch.setenv(VALUATIONS_PER_WORKER, "3")
    app = create_app({"TESTING": True})
    assert isinstance(app.wsgi_app, ValuationSlots)
    assert all(app.wsgi_app.slots.acquire(blocking=False) for _ in range(3))
    assert not app.wsgi_app.slots.acquire(blocking=False)
    monkeypatch.setenv(VALUATIONS_PER_WORKER, "0")
    assert not isinstance(create_app({"TESTING": True}).wsgi_app, ValuationSlots)
