"""A small reader for nginx configuration files: blocks and directives, enough for tests.

nginx's syntax: a directive is words ending in ';'; a block is words followed by '{ ... }';
'#' starts a comment outside quotes; words may be quoted with ' or ".
"""

from dataclasses import dataclass


@dataclass
class Directive:
    name: str
    args: list[str]
    block: list["Directive"] | None = None

    def find(self, name: str) -> list["Directive"]:
        return [d for d in self.block or [] if d.name == name]

    def one(self, name: str) -> "Directive":
        found = self.find(name)
        assert len(found) == 1, f"expected one {name!r} in {self.name}, found {len(found)}"
        return found[0]

    def walk(self):
        for child in self.block or []:
            yield child
            yield from child.walk()


def tokenize(text: str) -> list[str]:
    tokens, i, n = [], 0, len(text)
    while i < n:
        c = text[i]
        if c.isspace():
            i += 1
        elif c == "#":
            while i < n and text[i] != "\n":
                i += 1
        elif c in "{};":
            tokens.append(c)
            i += 1
        elif c in "'\"":
            end = text.index(c, i + 1)
            tokens.append(text[i + 1:end])
            i = end + 1
        else:
            j = i
            while j < n and not text[j].isspace() and text[j] not in "{};":
                j += 1
            tokens.append(text[i:j])
            i = j
    return tokens


def parse(text: str) -> Directive:
    """The whole file as the block of a root directive named 'main'."""
    tokens = tokenize(text)
    pos = 0

    def block(closing: bool) -> list[Directive]:
        nonlocal pos
        items: list[Directive] = []
        words: list[str] = []
        while pos < len(tokens):
            token = tokens[pos]
            pos += 1
            if token == ";":
                assert words, "empty directive"
                items.append(Directive(words[0], words[1:]))
                words = []
            elif token == "{":
                assert words, "block without a name"
                items.append(Directive(words[0], words[1:], block(True)))
                words = []
            elif token == "}":
                assert closing and not words, "unbalanced '}'"
                return items
            else:
                words.append(token)
        assert not closing and not words, "unterminated block or directive"
        return items

    return Directive("main", [], block(False))


def seconds(value: str) -> float:
    """An nginx time ('10s', '1m', '500ms', '30') in seconds."""
    units = {"ms": 0.001, "s": 1, "m": 60, "h": 3600}
    for unit in ("ms", "s", "m", "h"):
        if value.endswith(unit):
            return float(value[: -len(unit)]) * units[unit]
    return float(value)


def size(value: str) -> int:
    """An nginx size ('4m', '8k', '4194304') in bytes."""
    units = {"k": 1024, "m": 1024 * 1024, "g": 1024 ** 3}
    last = value[-1].lower()
    return int(value[:-1]) * units[last] if last in units else int(value)
