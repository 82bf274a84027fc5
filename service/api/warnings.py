"""Warnings: inputs the basis ignores and values that look mistaken. They never change a number."""

#: At most this many warnings are listed; a last entry counts the rest.
MAX_WARNINGS = 100
#: A rate outside this range looks like a percentage given as a number (4.5 for 4.5%).
_PLAUSIBLE_RATE = (-0.05, 0.25)
#: A flat extra above this looks like per mille given as a number (5 for 5 per mille).
_PLAUSIBLE_EXTRA = 0.1
#: A multiplier above this looks like a percentage (125 for 125%).
_PLAUSIBLE_MULTIPLIER = 10.0

_STATUS = {
    "demo": "This basis is demo data (status 'demo'), not approved for use.",
    "retired": "This basis version is retired: use it only to reproduce past results.",
}


def request_warnings(basis, data: dict, items: list[tuple[str, dict]]) -> list[dict]:
    """Return the warnings for a loaded request under ``basis``.

    ``items`` pairs each loaded item with the path that names it (``items.3`` or ``item``).
    """
    found: list[tuple[str, str]] = []
    if basis.status in _STATUS:
        found.append(("basis", _STATUS[basis.status]))
    rates = []
    if data.get("interest_rate") is not None:
        rates.append(("interest_rate", data["interest_rate"]))
    curve = data.get("interest")
    if curve is not None:
        rates += ([("interest.rate", curve.rates[0])] if curve.kind == "flat" else
                  [(f"interest.rates.{k}", r) for k, r in enumerate(curve.rates)])
    for path, rate in rates:
        if not _PLAUSIBLE_RATE[0] <= rate <= _PLAUSIBLE_RATE[1]:
            found.append((path, f"{rate:g} is read as {rate:.2%} a year; a rate of 4.5% is "
                                "given as 0.045."))
    for path, item in items:
        for k, life in enumerate(item["lives"]):
            if life["sex"] is not None and not basis.sex_distinct:
                found.append((f"{path}.lives.{k}.sex", "Ignored: this basis is unisex."))
            if life["duration"] is not None:
                index = basis.table_index(life["sex"])
                if index is not None and not basis.tables[index].select_period > 0:
                    found.append((f"{path}.lives.{k}.duration",
                                  "Ignored: this basis has no select rates; the life follows "
                                  "the ultimate rates."))
            extra = life.get("flat_extra", 0.0)
            if extra > _PLAUSIBLE_EXTRA:
                found.append((f"{path}.lives.{k}.flat_extra",
                              f"{extra:g} is added to q at every age ({extra * 1000:g} per "
                              "mille); 5 per mille is given as 0.005."))
            multiplier = life["mortality_multiplier"]
            if multiplier > _PLAUSIBLE_MULTIPLIER:
                found.append((f"{path}.lives.{k}.mortality_multiplier",
                              f"{multiplier:g} is read as {multiplier:g} times the table's "
                              f"rates ({multiplier:.0%}); 125% is given as 1.25."))
    warnings = [{"path": path, "message": message} for path, message in found[:MAX_WARNINGS]]
    if len(found) > MAX_WARNINGS:
        warnings.append({"path": "warnings", "message": f"{len(found) - MAX_WARNINGS} more "
                                                        "warnings are not listed."})
    return warnings
