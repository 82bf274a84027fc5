"""Gunicorn settings for the Annuity Factor Service (used by `make run`)."""

import multiprocessing
import os

bind = f"{os.environ.get('HOST', '127.0.0.1')}:{os.environ.get('PORT', '8000')}"
# A few workers: two per core, at least two, at most eight unless WEB_CONCURRENCY says.
workers = int(os.environ.get("WEB_CONCURRENCY",
                             max(2, min(8, 2 * multiprocessing.cpu_count()))))
worker_class = "sync"
# Load the app (and so every basis) once in the master; workers share it.
preload_app = True
timeout = 60
graceful_timeout = 30
keepalive = 5
# Bodies are limited by the app (413); headers are kept small.
limit_request_field_size = 8190
accesslog = None
errorlog = "-"
loglevel = os.environ.get("LOG_LEVEL", "info")
wsgi_app = "service.wsgi:create_app()"
