"""Defensive reading of the JSON and YAML files a user or a partner hands us (policies, manifests).

What a hostile or damaged file could do to the parsers of the standard library and PyYAML, and
what is refused here instead, each as a ``LoadProblem`` (a message without the file's name, which
the caller adds, with the line where known):

- a key written twice in one object or mapping (both parsers would keep the last one silently);
- NaN, Infinity and -Infinity in JSON (not JSON at all; Python's parser accepts them);
- nesting deeper than ``MAX_DEPTH`` (both parsers recurse and would stop with a RecursionError):
  JSON is scanned for its brackets outside strings before it is parsed, YAML is limited while
  its nodes are composed;
- more than ``MAX_NODES`` values in all;
- YAML aliases (``*name``) that expand to more values than the file's size allows (a file of a
  few hundred bytes can otherwise stand for billions of values: the cost of reading a file must
  stay bounded by its size), and an alias that refers to a node containing it.

Nothing here knows what the file means; ``policy.py`` and ``manifest.py`` check that after.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from typing import Any

import numpy as np
import yaml

__all__ = ["MAX_DEPTH", "MAX_NODES", "LoadProblem", "load_json", "load_yaml"]

MAX_DEPTH = 64                # lists/objects inside each other: a policy needs 5, a manifest 8
MAX_NODES = 10_000_000        # values in all (a manifest holds a 1024 x 1024 matrix twice: about 2 million)
ALIAS_FLOOR = 100_000         # YAML: aliases may always expand to this many values ...
ALIAS_PER_BYTE = 2            # ... or to this many per byte of the file, whichever is more


class LoadProblem(ValueError):
    """Why a file was refused (``text``, without the file's name), and where (1-based ``line``)."""

    def __init__(self, text: str, line: int | None = None) -> None:
        self.text, self.line = text, line
        super().__init__(text if line is None else f"{text} (line {line})")


# -- JSON ----------------------------------------------------------------------------------------

_JSON_STRING = re.compile(r'"[^"\\\n]*(?:\\.[^"\\\n]*)*"')
_JSON_CONSTANT = re.compile(r"-?\b(?:NaN|Infinity)\b")
_CHUNK = 1 << 20
_LONG_NUMBER = "a number has thousands of digits, more than any valid file needs"


def _blank_strings(text: str) -> bytes:
    """The text's UTF-8 bytes with every string's content blanked (its quotes kept), so that
    brackets, commas and words outside strings can be found by position."""
    return _JSON_STRING.sub(lambda m: '"' + " " * (len(m.group().encode("utf-8")) - 2) + '"', text).encode("utf-8")


def _line_at(data: bytes, pos: int) -> int:
    return data.count(b"\n", 0, pos) + 1


def _scan_json(data: bytes, max_nodes: int) -> None:
    """Depth and value count of a JSON text (strings blanked), chunk by chunk: flat memory."""
    depth = 0
    values = 1
    for start in range(0, len(data), _CHUNK):
        arr = np.frombuffer(data, dtype=np.uint8, count=min(_CHUNK, len(data) - start), offset=start)
        opens = (arr == ord("[")) | (arr == ord("{"))
        closes = (arr == ord("]")) | (arr == ord("}"))
        values += int(opens.sum()) + int((arr == ord(",")).sum())
        running = depth + np.cumsum(opens.astype(np.int64) - closes.astype(np.int64))
        if running.size and int(running.max()) > MAX_DEPTH:
            at = start + int(np.argmax(running > MAX_DEPTH))
            raise LoadProblem(f"lists and objects are nested more than {MAX_DEPTH} deep; no valid file needs that "
                              "many levels", _line_at(data, at))
        if running.size:
            depth = int(running[-1])
    if values > max_nodes:
        raise LoadProblem(f"it holds more than {max_nodes:,} values, more than any valid file needs")


_JSON_OBJECT: Any = vars(json.decoder)["JSONObject"]  # the pure-Python object parser (not in the type stubs)


class _Duplicate(Exception):
    def __init__(self, key: str) -> None:
        self.key = key


def _unique(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in pairs:
        if k in out:
            raise _Duplicate(k)
        out[k] = v
    return out


def _refuse_constant(name: str) -> Any:
    raise _Constant(name)


class _Constant(Exception):
    def __init__(self, name: str) -> None:
        self.name = name


def _duplicate_line(text: str, key: str) -> int | None:
    """The line where a duplicate key is written the second time.  The pure-Python decoder knows
    where each object starts and ends; it runs only once a duplicate was found."""
    found: list[tuple[int, int]] = []

    def parse_object(s_and_end: tuple[str, int], *args: Any) -> Any:
        strict, scan_once, object_hook, _, memo = args
        pairs, end = _JSON_OBJECT(s_and_end, strict, scan_once, object_hook, list, memo)
        if not found and [k for k, _ in pairs].count(key) > 1:
            found.append((s_and_end[1], end))
        return dict(pairs), end

    dec = json.JSONDecoder()
    dec.parse_object = parse_object  # type: ignore[attr-defined]
    dec.scan_once = json.scanner.py_make_scanner(dec)  # type: ignore[attr-defined]
    try:
        dec.decode(text)
    except (ValueError, RecursionError):
        return None
    if not found:
        return None
    start, end = found[0]
    blank = _JSON_STRING.sub(lambda m: '"' + " " * (len(m.group()) - 2) + '"', text[start:end])
    hits = [m.start() for m in re.finditer(re.escape(json.dumps(key)) + r"\s*:", text[start:end])
            if blank.count("{", 0, m.start()) + blank.count("[", 0, m.start())
            == blank.count("}", 0, m.start()) + blank.count("]", 0, m.start())]
    at = start + (hits[1] if len(hits) > 1 else 0)
    return text.count("\n", 0, at) + 1


def load_json(text: str, max_nodes: int = MAX_NODES) -> Any:
    """Strict JSON: no duplicate keys, no NaN/Infinity, depth and number of values (at most
    ``max_nodes``) limited (``LoadProblem``); a syntax error is the standard ``json.JSONDecodeError``."""
    data = _blank_strings(text)
    _scan_json(data, max_nodes)
    try:
        return json.loads(text, object_pairs_hook=_unique, parse_constant=_refuse_constant)
    except _Duplicate as dup:
        raise LoadProblem(f"the key {dup.key!r} appears twice in the same object (which one counts is not "
                          "defined); keep one", _duplicate_line(text, dup.key)) from None
    except _Constant as c:
        m = _JSON_CONSTANT.search(data.decode("utf-8", errors="replace"))
        raise LoadProblem(f"{c.name} is not a JSON number (strict JSON has no NaN or infinity); write a finite "
                          "number", None if m is None else _line_at(data, m.start())) from None
    except RecursionError:  # the scan above bounds the depth; kept as a last line of defence
        raise LoadProblem(f"lists and objects are nested more than {MAX_DEPTH} deep") from None
    except json.JSONDecodeError:
        raise
    except ValueError:  # an integer of thousands of digits (Python's limit on converting them)
        raise LoadProblem(_LONG_NUMBER) from None


# -- YAML ----------------------------------------------------------------------------------------

class _Loader(yaml.SafeLoader):
    """PyYAML's safe loader with a depth and node limit while composing, and unique mapping keys."""

    def __init__(self, stream: str, max_nodes: int = MAX_NODES) -> None:
        super().__init__(stream)
        self._depth = 0
        self._nodes = 0
        self._max_nodes = max_nodes

    def compose_node(self, parent: Any, index: Any) -> Any:
        self._depth += 1
        self._nodes += 1
        if self._depth > MAX_DEPTH:
            mark = self.peek_event().start_mark
            raise LoadProblem(f"lists and mappings are nested more than {MAX_DEPTH} deep; no valid file needs that "
                              "many levels", mark.line + 1)
        if self._nodes > self._max_nodes:
            raise LoadProblem(f"it holds more than {self._max_nodes:,} values, more than any valid file needs",
                              self.peek_event().start_mark.line + 1)
        try:
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


def _construct_mapping(loader: yaml.SafeLoader, node: yaml.MappingNode, deep: bool = False) -> dict:
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        line = key_node.start_mark.line + 1
        try:
            twice = key in seen
        except TypeError:
            raise LoadProblem("a key is itself a list or mapping; keys must be plain names", line) from None
        if twice:
            raise LoadProblem(f"the key {key!r} appears twice in the same mapping (YAML would keep the last one "
                              "silently); keep one", line)
        seen.add(key)
    return loader.construct_mapping(node, deep=deep)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _children(node: yaml.Node) -> list[yaml.Node]:
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    if isinstance(node, yaml.MappingNode):
        return [n for pair in node.value for n in pair]
    return []


def _check_expansion(root: yaml.Node, size: int, max_nodes: int) -> None:
    """The number of values the node graph stands for once every alias is expanded (one count per
    distinct node, memoized: linear in the file), refused past the limit; a cycle is refused."""
    limit = min(max_nodes, max(ALIAS_FLOOR, ALIAS_PER_BYTE * size))
    total: dict[int, int] = {}
    on_path: set[int] = set()
    stack: list[tuple[yaml.Node, bool]] = [(root, False)]
    while stack:
        node, done = stack.pop()
        nid = id(node)
        if done:
            on_path.discard(nid)
            total[nid] = 1 + sum(total[id(c)] for c in _children(node))
            if total[nid] > limit:
                raise LoadProblem(f"its aliases (*name) expand to more than {limit:,} values, far more than a file "
                                  f"of {size:,} bytes holds; write the values out, or reuse fewer of them",
                                  node.start_mark.line + 1)
            continue
        if nid in total:
            continue
        if nid in on_path:
            raise LoadProblem("an alias (*name) refers to a list or mapping that contains it, which would never end",
                              node.start_mark.line + 1)
        on_path.add(nid)
        stack.append((node, True))
        stack.extend((c, False) for c in _children(node) if id(c) not in total)


def load_yaml(text: str, inspect: Callable[[yaml.Node], None] | None = None, max_nodes: int = MAX_NODES) -> Any:
    """Safe YAML with unique keys, depth, number of values (at most ``max_nodes``) and alias
    expansion limited (``LoadProblem``);
    ``inspect`` sees the composed node graph before anything is built (it may raise
    ``LoadProblem`` too).  A syntax error is the standard ``yaml.YAMLError``."""
    loader = _Loader(text, max_nodes)
    try:
        node = loader.get_single_node()
        if node is None:
            return None
        _check_expansion(node, len(text.encode("utf-8")), max_nodes)
        if inspect is not None:
            inspect(node)
        try:
            return loader.construct_document(node)
        except LoadProblem:
            raise
        except ValueError:  # an integer of thousands of digits (Python's limit on converting them)
            raise LoadProblem(_LONG_NUMBER) from None
    finally:
        loader.dispose()
