"""What the installed ``annuity-service serve`` needs, shipped inside the package.

- ``gunicorn.conf.py``: the one gunicorn configuration (``make run``, the image, the live
  tests and ``make faults`` all use it). Gunicorn reads it by path; never import it as a
  module, because it prepares the Prometheus folder as a side effect.
- ``tables/``: the shipped bases. In a checkout this is a link to the repository's
  ``tables/``; a built wheel holds a copy, so an installed service finds its default tables
  wherever it is started from.

Importing this package is cheap: it names paths and nothing else.
"""

from pathlib import Path

HERE = Path(__file__).resolve().parent
#: The gunicorn configuration file.
GUNICORN_CONF = HERE / "gunicorn.conf.py"
#: The bases shipped with the service (resolved: the repository's tables/ in a checkout).
SHIPPED_TABLES = (HERE / "tables").resolve()
#: What gunicorn serves.
WSGI_APP = "service.wsgi:create_app()"
