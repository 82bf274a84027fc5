"""Gunicorn settings for the Annuity Factor Service: the one configuration that `make run`,
`annuity-service serve`, the image, the live tests and `make faults` use.

In production gunicorn listens on loopback behind the buffering proxy of deploy/nginx/ (a
sidecar in the same pod): the proxy reads each request whole before it reaches a worker, so
a slow client never holds a worker thread.
"""

import gc
import multiprocessing
import os
import shutil
import tempfile

bind = f"{os.environ.get('HOST', '127.0.0.1')}:{os.environ.get('PORT', '8000')}"
# Workers from CPUs: two per core, at least two, at most eight, unless WEB_CONCURRENCY says.
workers = int(os.environ.get("WEB_CONCURRENCY",
                             max(2, min(8, 2 * multiprocessing.cpu_count()))))
# Threaded workers: while one thread runs a long valuation (the GIL changes hands every
# 5 ms), another answers /livez, /readyz and /metrics, so probes are answered under heavy load.
worker_class = "gthread"
threads = int(os.environ.get("WEB_THREADS", "4"))
# A worker takes no more connections than it has threads: a request beyond that waits in the
# listening socket for whichever worker frees a thread first, never in a busy worker's queue.
worker_connections = threads
# No keep-alive: an idle kept-alive connection would hold one of those few places. The proxy
# opens one connection per request anyway.
keepalive = 0
# Load the app (and so every basis) once in the master; the workers share it after fork.
preload_app = True
# A worker whose main loop stops answering for this long is replaced. (The main loop keeps
# beating while a thread runs a valuation; the proxy bounds how long a caller waits.)
timeout = 60
# On SIGTERM, workers finish the requests they have accepted within this many seconds.
graceful_timeout = 30
limit_request_field_size = 8190
# Trust no forwarded headers (X-Forwarded-Proto, SCRIPT_NAME, PATH_INFO...) from any peer:
# behind a proxy in the same pod every peer is 127.0.0.1, which gunicorn would trust by
# default. Name the proxy's addresses in FORWARDED_ALLOW_IPS to trust them.
forwarded_allow_ips = os.environ.get("FORWARDED_ALLOW_IPS", "")
# No runtime control socket: the shared default path would be one socket for every instance
# on the machine (and cannot be made on a read-only filesystem).
control_socket_disable = True
accesslog = None  # the app writes one structured JSON line per request
errorlog = "-"
loglevel = os.environ.get("LOG_LEVEL", "info")
wsgi_app = "service.wsgi:create_app()"

# Prometheus multiprocess mode: every worker writes its samples to one shared folder, which
# must exist and be empty before the app (and prometheus_client) is imported.
_metrics_dir = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
_made_metrics_dir = not _metrics_dir
if _made_metrics_dir:
    _metrics_dir = tempfile.mkdtemp(prefix="annuity-metrics-")
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = _metrics_dir
else:
    os.makedirs(_metrics_dir, exist_ok=True)
    for _name in os.listdir(_metrics_dir):
        _path = os.path.join(_metrics_dir, _name)
        if os.path.isdir(_path):
            shutil.rmtree(_path)
        else:
            os.remove(_path)


def pre_fork(server, worker):
    """Before each worker is forked: move every object made so far (the app, its bases,
    numpy, pandas, flask) out of the garbage collector's generations. They live as long as
    the process; left in, each full collection in a worker walks them all (tens of
    milliseconds, a latency spike), and touching them unshares the pages fork shared."""
    gc.freeze()


def child_exit(server, worker):
    """Drop a dead worker's live gauges from the shared metrics folder."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)


def on_exit(server):
    """Remove the metrics folder this configuration made."""
    if _made_metrics_dir:
        shutil.rmtree(_metrics_dir, ignore_errors=True)
