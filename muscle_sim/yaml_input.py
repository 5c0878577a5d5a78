"""Bounded YAML reading for configs and specs: duplicate keys refused, nesting, aliases and size
capped, so hostile text gives one line within a fraction of a second instead of a traceback, a
hang or a huge message.

YAML 1.1 (what PyYAML reads) leaves duplicate mapping keys to the reader; the YAML 1.2 spec
(section 3.2.1.1) requires keys to be unique. Unbounded alias expansion ("billion laughs") is
the reason common practice caps aliases in untrusted YAML.
"""
from __future__ import annotations

import re

import yaml

from .errors import ConfigError

#: The largest config text read [bytes]; a shipped config is a few kB.
MAX_BYTES = 1_000_000
#: Deepest nesting of mappings and sequences; a config nests four deep.
MAX_DEPTH = 50
#: Most alias uses (``*name``) in one document.
MAX_ALIASES = 100
#: Most nodes after alias expansion (each alias counts the nodes it stands for).
MAX_NODES = 100_000
#: Longest value quoted in a message [characters].
QUOTE_LENGTH = 60


#: Line breaks (as str.splitlines sees them) with the blanks around them; a str's repr escapes
#: them, other objects' reprs (numpy arrays) may not.
_LINE_BREAK = re.compile(r"\s*[\n\r\x0b\x0c\x1c-\x1e\x85\u2028\u2029]\s*")


def shorten(text, limit: int = QUOTE_LENGTH) -> str:
    """``repr`` of ``text`` on one line (numpy arrays wrap theirs), cut to ``limit`` characters
    (with the full length said) for messages; an object without a usable repr is named by type."""
    try:
        s = _LINE_BREAK.sub(" ", repr(text))
    except Exception:           # e.g. an int past Python's digit limit for str(), a broken __repr__
        return f"<{type(text).__name__}>"
    if len(s) <= limit:
        return s
    return f"{s[:limit]}... ({len(s)} characters)"


class _BoundedLoader(yaml.SafeLoader):
    """PyYAML's safe loader with unique keys, a depth cap and alias / node budgets."""

    def __init__(self, stream, where: str):
        super().__init__(stream)
        self._where = where
        self._depth = 0
        self._aliases = 0

    def _fail(self, node, what: str):
        line = f" at line {node.start_mark.line + 1}" if node is not None and node.start_mark else ""
        raise ConfigError(f"{self._where}: {what}{line}")

    def compose_node(self, parent, index):
        if self.check_event(yaml.AliasEvent):
            self._aliases += 1
            if self._aliases > MAX_ALIASES:
                self._fail(None, f"more than {MAX_ALIASES} aliases are not allowed")
            return super().compose_node(parent, index)
        self._depth += 1
        try:
            if self._depth > MAX_DEPTH:
                self._fail(None, f"nesting deeper than {MAX_DEPTH} levels is not allowed")
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1

    def construct_mapping(self, node, deep=False):
        if isinstance(node, yaml.MappingNode):
            seen = set()
            for key_node, _ in node.value:
                key = key_node.value if isinstance(key_node, yaml.ScalarNode) else None
                if key is not None:
                    if key in seen:
                        self._fail(key_node, f"key {shorten(key)} appears twice; each key may be given once")
                    seen.add(key)
        return super().construct_mapping(node, deep=deep)


def _count_nodes(node, budget: list, seen: dict) -> int:
    """Nodes under ``node`` with aliases expanded (shared subtrees counted each time used),
    stopping as soon as the budget is spent."""
    key = id(node)
    if key in seen:
        n = seen[key]
    else:
        n = 1
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                n += _count_nodes(k, budget, seen) + _count_nodes(v, budget, seen)
        elif isinstance(node, yaml.SequenceNode):
            for item in node.value:
                n += _count_nodes(item, budget, seen)
        seen[key] = n
    if n > budget[0]:
        raise OverflowError
    return n


def parse_yaml_bytes(data: bytes, where: str):
    """The document in ``data`` (UTF-8 YAML) as Python values, or a one-line :class:`ConfigError`
    naming ``where``."""
    if len(data) > MAX_BYTES:
        raise ConfigError(f"{where}: {len(data)} bytes is not allowed; must be at most {MAX_BYTES} bytes")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{where}: byte {exc.start} is not UTF-8 text; save the file as UTF-8") from None
    if "\x00" in text:
        raise ConfigError(f"{where}: a NUL character is not allowed in a YAML text")
    loader = None
    try:
        loader = _BoundedLoader(text, where)      # the reader already refuses unprintable characters
        node = loader.get_single_node()
        if node is None:
            return None
        try:
            _count_nodes(node, [MAX_NODES], {})
        except OverflowError:
            raise ConfigError(f"{where}: more than {MAX_NODES} values after alias expansion are not allowed") \
                from None
        return loader.construct_document(node)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        line = f" at line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{where}: not valid YAML{line}") from None
    except RecursionError:
        raise ConfigError(f"{where}: nesting too deep to read") from None
    finally:
        if loader is not None:
            loader.dispose()
