"""Render the proxy's nginx configuration from nginx.conf.template (standard library only).

    python deploy/nginx/render.py --profile container --output nginx.conf

The limits are the production figures and are the same in every profile; a profile only
says where nginx listens, where gunicorn is and where nginx writes. `make faults` renders the
same template with its own addresses and a temporary directory (tests/live/proxy.py), so
what it measures is what the image ships.
"""

import argparse
import re
import sys
from pathlib import Path

TEMPLATE = Path(__file__).resolve().with_name("nginx.conf.template")

#: The service's body limit (service/app.py MAX_CONTENT_LENGTH), in bytes.
MAX_BODY_BYTES = 4 * 1024 * 1024

#: Production figures (see README, "Deploying").
LIMITS = {
    # The whole request header must arrive within this.
    "client_header_timeout": "10s",
    # Longest pause between two reads of a request body.
    "client_body_timeout": "10s",
    # Longest wait for a client to read the response.
    "send_timeout": "10s",
    "keepalive_timeout": "10s",
    "client_max_body_size": str(MAX_BODY_BYTES),
    # Requests in progress at once from one client address.
    "per_client_connections": "64",
    # How long a caller waits for a valuation (the heaviest takes seconds; queues add more).
    "proxy_read_timeout": "120s",
    "worker_processes": "1",
    "worker_connections": "4096",
    "shutdown_timeout": "15s",
}

#: Where things are, for the proxy image (a sidecar beside gunicorn in the pod).
PROFILES = {
    "container": {
        "listen": "0.0.0.0:8000",
        "health_listen": "0.0.0.0:8081",
        "upstream": "127.0.0.1:8001",
        "runtime_dir": "/tmp",
        "error_log": "stderr",
        "access_log": "/dev/stdout",
    },
}

_PLACEHOLDER = re.compile(r"\{\{\s*([a-z_]+)\s*\}\}")


def placeholders(template: str | None = None) -> set[str]:
    """The names the template needs."""
    return set(_PLACEHOLDER.findall(template if template is not None else TEMPLATE.read_text()))


def render(values: dict[str, str], template: str | None = None) -> str:
    """Fill every placeholder; refuse a missing or an unknown name."""
    text = template if template is not None else TEMPLATE.read_text()
    needed = placeholders(text)
    missing = needed - values.keys()
    unknown = values.keys() - needed
    if missing or unknown:
        raise ValueError(f"nginx template: missing {sorted(missing)}, unknown {sorted(unknown)}")
    for name, value in values.items():
        if not re.fullmatch(r"[^\s;{}'\"]+", str(value)):
            raise ValueError(f"nginx template: {name}={value!r} is not one plain word")
    return _PLACEHOLDER.sub(lambda m: str(values[m.group(1)]), text)


def values_for(profile: str | dict[str, str], **overrides: str) -> dict[str, str]:
    """The production limits with a profile's places (a name in PROFILES, or a dict)."""
    places = PROFILES[profile] if isinstance(profile, str) else profile
    return LIMITS | places | overrides


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--profile", choices=sorted(PROFILES), default="container")
    parser.add_argument("--set", action="append", default=[], metavar="NAME=VALUE",
                        help="override one value (repeatable)")
    parser.add_argument("--output", help="file to write (default: standard output)")
    args = parser.parse_args(argv)
    overrides = dict(item.split("=", 1) for item in args.set)
    text = render(values_for(args.profile, **overrides))
    if args.output:
        Path(args.output).write_text(text)
    else:
        sys.stdout.write(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
