"""Reading a YAML or JSON document from someone else, within bounds: the one loader both
doors use (the CLI's spec files and the REST service's request bodies).

- YAML is read with PyYAML's safe loader (no tags that build Python objects) and at most
  :data:`MAX_ALIASES` alias references; a handful of anchors is legitimate, an alias bomb
  (a few kilobytes that expand into gigabytes) is not.
- JSON is strict: ``NaN`` and ``Infinity`` are not numbers.
- Either way the document, with every alias expanded, has at most :data:`MAX_NODES`
  values and :data:`MAX_DEPTH` levels of nesting, and no text holds a lone UTF-16
  surrogate (which cannot be written back as UTF-8). The walk that checks this stops at the
  first excess, so a hostile document costs bounded time and memory.

Every refusal is an :class:`~optimizer.errors.InputError` naming where and what is allowed.
"""

from __future__ import annotations

import json
from typing import Any

import yaml

from optimizer.errors import InputError, Problem

MAX_ALIASES = 32  # alias references (*name) in one YAML document
MAX_NODES = 50_000  # values in a document, aliases expanded (a spec has about 60)
MAX_DEPTH = 32  # levels of nesting (a spec has 3)
MAX_BYTES = 1024 * 1024  # a spec file (the REST service has its own, smaller body limit)
MAX_INT_DIGITS = 4300  # the longest integer text int() converts (Python's default limit)


class _BoundedLoader(yaml.SafeLoader):
    """PyYAML's safe loader counting alias references, refusing a key given twice in one
    mapping and an integer of more digits than Python converts (:data:`MAX_INT_DIGITS`)."""

    def compose_node(self, parent: Any, index: Any) -> Any:
        if self.check_event(yaml.events.AliasEvent):
            self._aliases = getattr(self, "_aliases", 0) + 1
            if self._aliases > MAX_ALIASES:
                event = self.peek_event()
                raise yaml.composer.ComposerError(
                    None, None, f"more than {MAX_ALIASES} YAML aliases (*name) in one document", event.start_mark
                )
        return super().compose_node(parent, index)

    def construct_mapping(self, node: Any, deep: bool = False) -> Any:
        if isinstance(node, yaml.MappingNode):
            first: dict[Any, Any] = {}  # key -> the mark where it was first given
            for key_node, _ in node.value:
                if key_node.tag == "tag:yaml.org,2002:merge":
                    continue  # a merged mapping's keys may be overridden: that is what << is for
                key = self.construct_object(key_node, deep=deep)
                try:
                    mark = first.setdefault(key, key_node.start_mark)
                except TypeError:
                    continue  # an unhashable key: the base class refuses it
                if mark is not key_node.start_mark:
                    raise yaml.constructor.ConstructorError(
                        None,
                        None,
                        f"key {_shorten(key)!r} given twice (first on line {mark.line + 1}); give each key once",
                        key_node.start_mark,
                    )
        return super().construct_mapping(node, deep=deep)

    def construct_yaml_int(self, node: Any) -> int:
        try:
            return super().construct_yaml_int(node)
        except ValueError:  # more digits than int() converts
            raise yaml.constructor.ConstructorError(
                None,
                None,
                f"a number of at most {MAX_INT_DIGITS} digits (this integer has {len(node.value)} characters)",
                node.start_mark,
            ) from None


_BoundedLoader.add_constructor("tag:yaml.org,2002:int", _BoundedLoader.construct_yaml_int)


def _shorten(key: object) -> object:
    """A mapping key to name in a message: text of at most 40 characters."""
    return key if not isinstance(key, str) or len(key) <= 40 else f"{key[:40]}..."


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """A JSON object from its (key, value) pairs; InputError if a key is given twice."""
    data: dict[str, Any] = {}
    for key, value in pairs:
        if key in data:
            raise InputError.single(
                str(_shorten(key)),
                key,
                "each key once in a JSON object; this key is given twice",
                "unreadable document",
            )
        data[key] = value
    return data


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number")


def parse_yaml(text: str, where: str) -> Any:
    """The YAML document in ``text``; InputError (at ``where``:line:column) if it is not
    valid, safe and within bounds."""
    try:
        data = yaml.load(text, Loader=_BoundedLoader)  # noqa: S506 - a SafeLoader subclass
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        place = f"{where}:{mark.line + 1}:{mark.column + 1}" if mark else where
        lines = text.splitlines()
        shown = lines[mark.line][:200] if mark and mark.line < len(lines) else ""
        reason = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        raise InputError.single(place, shown, f"valid YAML ({reason})", "unreadable document") from None
    except RecursionError:
        raise InputError.single(
            where, "<deeply nested YAML>", f"at most {MAX_DEPTH} levels of nesting", "unreadable document"
        ) from None
    check_tree(data, where)
    return data


def parse_json(text: str, where: str) -> Any:
    """The JSON document in ``text`` (strict: no NaN or Infinity); InputError if it is not
    valid or not within bounds."""
    try:
        data = json.loads(text, parse_constant=_reject_constant, object_pairs_hook=_unique_keys)
    except json.JSONDecodeError as exc:
        raise InputError.single(
            f"{where}:{exc.lineno}:{exc.colno}",
            exc.doc[exc.pos : exc.pos + 20],
            f"valid JSON ({exc.msg})",
            "unreadable document",
        ) from None
    except RecursionError:
        raise InputError.single(
            where, "<deeply nested JSON>", f"at most {MAX_DEPTH} levels of nesting", "unreadable document"
        ) from None
    except InputError as exc:  # a key given twice
        raise InputError(
            [Problem(f"{where}: {p.where}", p.value, p.expected) for p in exc.problems], exc.title
        ) from None
    except ValueError as exc:  # NaN / Infinity, or an integer of more digits than Python converts
        raise InputError.single(
            where,
            str(exc)[:120],
            f"valid JSON with finite numbers of at most {MAX_INT_DIGITS} digits",
            "unreadable document",
        ) from None
    check_tree(data, where)
    return data


def parse_document(text: str, where: str, *, yaml_ok: bool = True) -> Any:
    """A JSON document (text starting with ``{`` or ``[``) or, if ``yaml_ok``, YAML."""
    if len(text) > MAX_BYTES:
        raise InputError.single(
            where, f"{len(text)} characters", f"a document of at most {MAX_BYTES} bytes", "document too large"
        )
    if not yaml_ok or text.lstrip()[:1] in ("{", "["):
        return parse_json(text, where)
    return parse_yaml(text, where)


def check_tree(data: Any, where: str = "<document>") -> None:
    """Raise InputError unless ``data`` (aliases expanded) has at most MAX_NODES values,
    MAX_DEPTH levels and no lone surrogate in any text. Iterative; stops at the first excess."""
    stack: list[tuple[Any, int, str]] = [(data, 0, "")]
    nodes = 0
    while stack:
        value, depth, path = stack.pop()
        nodes += 1
        if nodes > MAX_NODES:
            raise InputError.single(
                where,
                f"more than {MAX_NODES} values",
                f"a document of at most {MAX_NODES} values (aliases expanded)",
                "document too large",
            )
        if depth > MAX_DEPTH:
            raise InputError.single(
                path or where, "<nested deeper>", f"at most {MAX_DEPTH} levels of nesting", "document too deep"
            )
        if isinstance(value, str):
            _text(value, path or where)
        elif isinstance(value, dict):
            for key, item in value.items():
                if isinstance(key, str):
                    _text(key, path or where)
                stack.append((item, depth + 1, f"{path}.{key}" if path else str(key)))
        elif isinstance(value, (list, tuple)):
            stack.extend((item, depth + 1, f"{path}[{i}]") for i, item in enumerate(value))


def _text(value: str, where: str) -> None:
    try:
        value.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise InputError.single(
            where[:200],
            value[max(exc.start - 10, 0) : exc.end + 10],
            "text of whole Unicode characters (a lone UTF-16 surrogate "
            f"\\u{ord(value[exc.start]):04x} cannot be stored)",
        ) from None
