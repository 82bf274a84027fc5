"""Operator commands: serve, check a tables folder, import a table file, write the OpenAPI
file."""

import argparse
import logging
import os
import sys
from pathlib import Path

from service.app import DEFAULT_TABLES
from service.serving import GUNICORN_CONF, WSGI_APP

ROOT = Path(__file__).resolve().parent.parent
OPENAPI_FILE = ROOT / "openapi" / "openapi.json"
#: The batch limit written into the committed contract (the default configuration).
DEFAULT_MAX_ITEMS = 10_000


def serve_command(args) -> list[str]:
    """The gunicorn command line for ``serve``; flags given win over the environment."""
    if args.port is not None:
        os.environ["PORT"] = str(args.port)
    if args.host is not None:
        os.environ["HOST"] = args.host
    if args.workers is not None:
        os.environ["WEB_CONCURRENCY"] = str(args.workers)
    # The gunicorn of this very interpreter, wherever it was installed.
    return [sys.executable, "-m", "gunicorn", "--config", str(GUNICORN_CONF), WSGI_APP]


def _serve(args) -> int:
    argv = serve_command(args)
    os.execv(argv[0], argv)
    return 1  # pragma: no cover - execv does not return


def _check_tables(args) -> int:
    from service.bases import load_registry
    from service.bases.registry import printable

    logging.basicConfig(level=logging.ERROR, format="%(message)s")
    try:
        registry = load_registry(args.directory)
    except OSError as exc:
        print(f"error: {printable(str(exc))}", file=sys.stderr)
        return 2
    # Everything printed is escaped: a file name or a refused file's content could hold
    # control characters (terminal escapes, new lines) or look-alike letters.
    for basis in registry.listing():
        marker = " (default)" if registry.is_default(basis) else ""
        print(printable(f"ok       {basis.ref}{marker}  {basis.status}  {basis.digest}  "
                        f"{basis.file}"))
    for refusal in registry.refused:
        if not refusal.problems:
            print(f"REFUSED  {printable(refusal.file)}: {printable(refusal.detail)}")
            continue
        # Every problem found in the file, one a line, each naming the file and its line.
        print(f"REFUSED  {printable(refusal.file)}: {len(refusal.problems)} problems")
        for problem in refusal.problems:
            print(f"  - {printable(problem)}")
    if not registry.bases and not registry.refused:
        print(f"error: no basis files (*.toml) under {printable(str(args.directory))}",
              file=sys.stderr)
        return 1
    return 1 if registry.refused else 0


def _table_choice(text: str) -> tuple[str, int]:
    sex, sep, number = text.partition("=")
    if not sep or not number.strip().isdigit():
        raise argparse.ArgumentTypeError(f"{text!r} is not SEX=N (for example female=1)")
    return sex.strip(), int(number)


def _import_xml(args) -> int:
    from service.bases.registry import printable
    from service.bases.xml_import import DEFAULT_INTEREST_RATE, ImportRefused, import_xml

    tables = {}
    for sex, number in args.table:
        if sex in tables:
            print(f"error: --table {printable(sex)} is given twice", file=sys.stderr)
            return 2
        tables[sex] = number
    rate = DEFAULT_INTEREST_RATE if args.interest_rate is None else args.interest_rate
    try:
        done = import_xml(args.file, args.outdir, basis_id=args.basis_id, version=args.version,
                          tables=tables or None, improvement=args.improvement,
                          first_age=args.first_age, close_at=args.close_at,
                          interest_rate=rate, force=args.force)
    except ImportRefused as exc:
        print(f"error: {printable(str(exc))}", file=sys.stderr)
        return 1
    out = Path(args.outdir)
    print(printable(f"source   {Path(args.file).name}  sha256:{done.sha256}"))
    if done.basis_file:
        print(printable(f"basis    {out / done.basis_file}  (status demo, {done.digest})"))
    for rel in done.data_files:
        print(printable(f"data     {out / rel}"))
    for rel in done.scale_files:
        print(printable(f"scale    {out / rel}  (improvement scale: name it in a basis' "
                        "[improvement] to use it)"))
    if not done.basis_file:
        print("no basis written: the file holds no mortality table")
    return 0


def _write_openapi(args) -> int:
    from service.api.openapi import spec_json

    text = spec_json(DEFAULT_MAX_ITEMS)
    target = Path(args.output)
    if args.check:
        current = target.read_text() if target.exists() else ""
        if current != text:
            print(f"{target} is out of date: run 'annuity-service write-openapi'",
                  file=sys.stderr)
            return 1
        return 0
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(text)
    print(f"wrote {target}")
    return 0


def _hash_token(args) -> int:
    import hashlib

    token = sys.stdin.readline().strip()
    if not token:
        print("error: give the token on standard input", file=sys.stderr)
        return 1
    print(hashlib.sha256(token.encode("utf-8")).hexdigest())
    return 0


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="annuity-service", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    serve = sub.add_parser("serve", help="serve the API with gunicorn (PORT, default 8000)")
    serve.add_argument("--port", type=int, default=None,
                       help="port to listen on (default: PORT, else 8000)")
    serve.add_argument("--host", default=None,
                       help="address to listen on (default: HOST, else 127.0.0.1)")
    serve.add_argument("--workers", type=int, default=None,
                       help="worker processes (default: WEB_CONCURRENCY, else from the CPUs)")
    serve.set_defaults(func=_serve)
    check = sub.add_parser("check-tables", help="validate a tables folder; non-zero on any "
                                                "problem")
    check.add_argument("directory", nargs="?", default=str(DEFAULT_TABLES))
    check.set_defaults(func=_check_tables)
    imp = sub.add_parser(
        "import-xml",
        help="convert a rate table file in the actuarial profession's open XML standard "
             "into a basis skeleton (status demo) and CSV data under OUTDIR; writes nothing "
             "on any problem")
    imp.add_argument("file", help="the XML file")
    imp.add_argument("outdir", help="the folder to write <id>-<version>.toml and data/ into")
    imp.add_argument("--id", dest="basis_id", default=None,
                     help="basis id (default: from the file name)")
    imp.add_argument("--version", default=None,
                     help="basis version (default: a final -<digits.dots> of the file name, "
                          "else 1)")
    imp.add_argument("--table", action="append", type=_table_choice, default=[],
                     metavar="SEX=N",
                     help="which mortality table (numbered in file order; a select table "
                          "with its ultimate by the select one) is female, male or unisex; "
                          "needed when the file holds more than one")
    imp.add_argument("--improvement", action="append", type=int, default=[], metavar="N",
                     help="read table N of a mortality file as an improvement scale")
    imp.add_argument("--first-age", type=int, default=None, metavar="AGE",
                     help="drop the rows of every mortality table before AGE")
    imp.add_argument("--close-at", type=int, default=None, metavar="AGE",
                     help="append q = 1 at AGE (the age after the last) to tables that do not "
                          "close with q = 1")
    imp.add_argument("--interest-rate", type=float, default=None, metavar="RATE",
                     help="the skeleton's flat interest rate, a placeholder to review "
                          "(default 0.04)")
    imp.add_argument("--force", action="store_true", help="replace files that already exist")
    imp.set_defaults(func=_import_xml)
    write = sub.add_parser("write-openapi", help="write the OpenAPI contract to openapi/")
    write.add_argument("--output", default=str(OPENAPI_FILE))
    write.add_argument("--check", action="store_true", help="fail if the file is out of date")
    write.set_defaults(func=_write_openapi)
    hasher = sub.add_parser("hash-token", help="print the SHA-256 of a bearer token read from "
                                              "standard input, for ANNUITY_TOKEN_SHA256")
    hasher.set_defaults(func=_hash_token)
    args = parser.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    raise SystemExit(main())
