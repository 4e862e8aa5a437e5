"""Read a YAML file safely and remember the line of every key.

Only the safe loader is used (``yaml.CSafeLoader`` when PyYAML has libyaml, else
``yaml.SafeLoader``): the document is *composed* into nodes (which carry their
marks), then built into plain Python values here, so each key path gets its line number,
duplicate keys are found (PyYAML silently keeps the last one), and aliases cannot expand
without bound or refer to themselves. Scalars are constructed by the SafeLoader itself.
"""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import yaml
from yaml.nodes import MappingNode, ScalarNode, SequenceNode

from .errors import Problem

# libyaml's parser when PyYAML was built with it (about ten times faster), else the pure-Python
# one; both are the *safe* loader: the same SafeConstructor builds every scalar.
LOADER: type = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

MAX_FILE_BYTES = 1 << 20        # 1 MiB: a protocol is a page of text, not a data file
MAX_NODES = 100_000             # after alias expansion
MAX_DEPTH = 40

_MAP_TAG = "tag:yaml.org,2002:map"
_SEQ_TAG = "tag:yaml.org,2002:seq"
_MERGE_TAG = "tag:yaml.org,2002:merge"

Path_ = tuple  # a key path: tuple of str (mapping keys) and int (sequence indices)


class Invalid:
    """Marks a value that could not be read; a problem has been recorded for it."""

    _instance = None

    def __new__(cls):
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:
        return "<invalid>"


INVALID = Invalid()


def format_path(path: Path_) -> str:
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


@dataclass
class Document:
    file: str
    value: Any
    lines: dict[Path_, int] = field(default_factory=dict)

    def line_of(self, path: Path_) -> int | None:
        path = tuple(path)
        while True:
            if path in self.lines:
                return self.lines[path]
            if not path:
                return None
            path = path[:-1]


class _TooMany(Exception):
    pass


def source_text(source: Any, *, source_name: str | None = None,
                what: str = "protocol") -> tuple[str | None, str, list[Problem]]:
    """Turn a path, a text or bytes into (text, file label, problems).

    A ``str`` is taken as YAML text when it contains a newline or does not name an existing
    file and does not end in ``.yaml``/``.yml``; otherwise it is a path.
    """
    raw: bytes | None = None
    text: str | None = None
    if isinstance(source, (bytes, bytearray)):
        raw = bytes(source)
        label = source_name or "<text>"
    elif isinstance(source, os.PathLike) or (
        isinstance(source, str) and "\n" not in source and (
            os.path.isfile(source) or source.lower().endswith((".yaml", ".yml"))
        )
    ):
        label = source_name or os.fspath(source)
        p = Path(source)
        try:
            size = p.stat().st_size
            if not p.is_file():
                return None, label, [_whole(label, f"is not a file", "a YAML file")]
            if size > MAX_FILE_BYTES:
                return None, label, [_whole(
                    label, f"is too large ({size} bytes); a {what} file may be at most "
                    f"{MAX_FILE_BYTES} bytes (1 MiB)", f"at most {MAX_FILE_BYTES} bytes")]
            with open(p, "rb") as fh:
                raw = fh.read(MAX_FILE_BYTES + 1)
        except FileNotFoundError:
            return None, label, [_whole(label, "no such file", "an existing YAML file")]
        except IsADirectoryError:
            return None, label, [_whole(label, "is a directory, not a file", "a YAML file")]
        except (OSError, ValueError) as exc:
            reason = getattr(exc, "strerror", None) or str(exc)
            return None, label, [_whole(label, f"cannot be read: {reason}",
                                        "a readable YAML file")]
    elif isinstance(source, str):
        text = source
        label = source_name or "<text>"
    else:
        label = source_name or "<input>"
        return None, label, [_whole(
            label, f"expected a file path or YAML text; got {type(source).__name__}",
            "a path, str or bytes")]

    if raw is not None:
        if len(raw) > MAX_FILE_BYTES:
            return None, label, [_whole(
                label, f"is too large (more than {MAX_FILE_BYTES} bytes); a {what} file may be "
                "at most 1 MiB", f"at most {MAX_FILE_BYTES} bytes")]
        if b"\x00" in raw:
            at = raw.index(b"\x00")
            return None, label, [_whole(
                label, f"is not a text file (binary data: a NUL byte at offset {at})",
                "UTF-8 YAML text")]
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            line = raw[: exc.start].count(b"\n") + 1
            return None, label, [Problem(label, line, "", None, "UTF-8 YAML text",
                                         f"is not UTF-8 text (undecodable byte at offset "
                                         f"{exc.start}); binary data?")]
    assert text is not None
    if len(text.encode("utf-8", "surrogatepass")) > MAX_FILE_BYTES:
        return None, label, [_whole(
            label, f"is too large; a {what} file may be at most 1 MiB",
            f"at most {MAX_FILE_BYTES} bytes")]
    if "\x00" in text:
        return None, label, [_whole(label, "is not a text file (contains a NUL character)",
                                    "UTF-8 YAML text")]
    if not text.strip():
        return None, label, [_whole(label, f"is empty; expected a {what} (a YAML mapping)",
                                    f"a YAML mapping of {what} keys")]
    return text, label, []


def _whole(label: str, message: str, allowed: str) -> Problem:
    return Problem(label, None, "", None, allowed, message)


def parse(text: str, label: str, *, what: str = "protocol") -> tuple[Document | None, list[Problem]]:
    """Compose and build the single YAML document in ``text``."""
    problems: list[Problem] = []
    try:
        loader = LOADER(text)
    except yaml.reader.ReaderError as exc:
        return None, [_reader_problem(exc, text, label)]
    try:
        try:
            node = loader.get_single_node()
        except yaml.MarkedYAMLError as exc:
            mark = exc.problem_mark or exc.context_mark
            line = mark.line + 1 if mark is not None else None
            detail = exc.problem or str(exc)
            if exc.context:
                detail = f"{exc.context}: {detail}" if exc.problem else exc.context
            return None, [Problem(label, line, "", None, "a YAML document",
                                  f"is not valid YAML: {detail}")]
        except yaml.reader.ReaderError as exc:
            return None, [_reader_problem(exc, text, label)]
        except yaml.YAMLError as exc:
            return None, [_whole(label, f"is not valid YAML: {exc}", "a YAML document")]
        except RecursionError:
            return None, [_whole(label, "is not usable: nested too deeply",
                                 f"at most {MAX_DEPTH} levels")]
        if node is None:
            return None, [_whole(label, f"holds no {what} (only comments or an empty "
                                 "document)", f"a YAML mapping of {what} keys")]
        doc = Document(label, None)
        builder = _Builder(loader, doc, problems)
        try:
            doc.value = builder.build(node, (), 0)
        except _TooMany:
            return None, [_whole(label, f"expands to more than {MAX_NODES} values (aliases?)",
                                 f"at most {MAX_NODES} values")]
        except RecursionError:
            return None, [_whole(label, "is not usable: nested too deeply",
                                 f"at most {MAX_DEPTH} levels")]
        doc.lines.setdefault((), node.start_mark.line + 1)
        return doc, problems
    finally:
        loader.dispose()


def _reader_problem(exc: yaml.reader.ReaderError, text: str, label: str) -> Problem:
    line = text[: exc.position].count("\n") + 1 if exc.position is not None else None
    char = exc.character
    shown = f"#x{char:04x}" if isinstance(char, int) else repr(char)
    return Problem(label, line, "", None, "printable UTF-8 text",
                   f"is not valid YAML text: {exc.reason} (character {shown}); binary data?")


def describe(value: Any) -> str:
    """A short description of a value for messages: numbers and text as written."""
    if value is None:
        return "nothing (null)"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        if isinstance(value, int) and abs(value) > 10**15:
            return f"{str(value)[:12]}… ({len(str(abs(value)))} digits)"
        return f"{value:g}" if isinstance(value, float) and math.isfinite(value) else repr(value)
    if isinstance(value, str):
        s = value if len(value) <= 60 else value[:57] + "..."
        return repr(s)
    if isinstance(value, dict):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return f"a {type(value).__name__} value"


class _Builder:
    def __init__(self, loader: Any, doc: Document, problems: list[Problem]):
        self.loader = loader
        self.doc = doc
        self.problems = problems
        self.count = 0
        self.active: set[int] = set()

    def problem(self, path: Path_, line: int, message: str, value: Any = None,
                allowed: str = "") -> None:
        self.problems.append(Problem(self.doc.file, line, format_path(path), value, allowed,
                                     message))

    def build(self, node: Any, path: Path_, depth: int) -> Any:
        self.count += 1
        if self.count > MAX_NODES:
            raise _TooMany
        line = node.start_mark.line + 1
        self.doc.lines.setdefault(path, line)
        if depth > MAX_DEPTH:
            self.problem(path, line, f"nested more than {MAX_DEPTH} levels deep", None,
                         f"at most {MAX_DEPTH} levels")
            return INVALID
        if id(node) in self.active:
            self.problem(path, line, "an alias refers to a value that contains it", None,
                         "a finite document")
            return INVALID
        if isinstance(node, ScalarNode):
            return self._scalar(node, path, line)
        self.active.add(id(node))
        try:
            if isinstance(node, SequenceNode):
                if node.tag != _SEQ_TAG:
                    self.problem(path, line, f"the YAML tag {_short_tag(node.tag)} is not "
                                 "allowed here", None, "a plain list")
                    return INVALID
                return [self.build(item, path + (i,), depth + 1)
                        for i, item in enumerate(node.value)]
            if isinstance(node, MappingNode):
                if node.tag != _MAP_TAG:
                    self.problem(path, line, f"the YAML tag {_short_tag(node.tag)} is not "
                                 "allowed here", None, "a plain mapping")
                    return INVALID
                return self._mapping(node, path, line, depth)
        finally:
            self.active.discard(id(node))
        self.problem(path, line, "cannot be read", None, "a YAML value")  # pragma: no cover
        return INVALID

    def _scalar(self, node: ScalarNode, path: Path_, line: int) -> Any:
        try:
            value = self.loader.construct_object(node, deep=True)
        except yaml.YAMLError as exc:
            detail = getattr(exc, "problem", None) or str(exc)
            self.problem(path, line, f"cannot be read ({detail}); quote it if it is text",
                         node.value, "a number, true/false, null or text")
            return INVALID
        except (ValueError, OverflowError, TypeError, AttributeError, KeyError) as exc:
            # (PyYAML's constructors of explicitly tagged scalars fail with AttributeError on
            # "!!timestamp 2024-01-01x" and KeyError on "!!bool maybe")
            self.problem(path, line, f"cannot be read ({exc}); quote it if it is text",
                         node.value, "a number, true/false, null or text")
            return INVALID
        if isinstance(value, (bytes, bytearray)):
            self.problem(path, line, "binary data (!!binary) is not allowed", None,
                         "a number, true/false, null or text")
            return INVALID
        return value

    def _mapping(self, node: MappingNode, path: Path_, line: int, depth: int) -> Any:
        # duplicate keys among the mapping's own entries (merge keys are expected to repeat)
        seen: dict[Any, int] = {}
        own: list[tuple[Any, Any, int]] = []
        has_merge = False
        for key_node, value_node in node.value:
            if key_node.tag == _MERGE_TAG:
                has_merge = True
                continue
            key_line = key_node.start_mark.line + 1
            key = self._key(key_node, path, key_line)
            if key is INVALID:
                continue
            if key in seen:
                self.problem(path + (key,), key_line,
                             f"duplicate key {key!r} (first given at line {seen[key]})",
                             key, "each key once")
                continue
            seen[key] = key_line
            own.append((key, value_node, key_line))
        merged: list[tuple[Any, Any, int]] = []
        if has_merge:
            try:
                copy = MappingNode(node.tag, list(node.value), node.start_mark, node.end_mark,
                                   node.flow_style)
                self.loader.flatten_mapping(copy)
            except yaml.YAMLError as exc:
                self.problem(path, line, f"a merge key (<<) cannot be used here: "
                             f"{getattr(exc, 'problem', None) or exc}", None,
                             "<< with a mapping or a list of mappings")
                return INVALID
            except RecursionError:
                self.problem(path, line, "a merge key (<<) refers to itself", None,
                             "a finite document")
                return INVALID
            n_own = len(node.value) - sum(1 for k, _ in node.value if k.tag == _MERGE_TAG)
            merged_map: dict[Any, tuple[Any, int]] = {}
            for key_node, value_node in copy.value[: len(copy.value) - n_own]:
                key_line = key_node.start_mark.line + 1
                key = self._key(key_node, path, key_line)
                if key is INVALID or key in seen:
                    continue
                merged_map[key] = (value_node, key_line)   # later wins, as PyYAML does
            merged = [(k, v, ln) for k, (v, ln) in merged_map.items()]
        out: dict[Any, Any] = {}
        for key, value_node, key_line in merged + own:
            self.doc.lines[path + (key,)] = key_line
            out[key] = self.build(value_node, path + (key,), depth + 1)
        return out

    def _key(self, key_node: Any, path: Path_, key_line: int) -> Any:
        if not isinstance(key_node, ScalarNode):
            self.problem(path, key_line, "a key must be plain text, not a list or mapping",
                         None, "text keys")
            return INVALID
        try:
            key = self.loader.construct_object(key_node, deep=True)
        except (yaml.YAMLError, ValueError, OverflowError, TypeError, AttributeError, KeyError):
            key = INVALID
        if not isinstance(key, str):
            hint = ""
            if isinstance(key, bool):
                hint = " (YAML reads yes/no/on/off as true/false; quote the key)"
            self.problem(path, key_line, f"the key {key_node.value!r} is not text{hint}",
                         key_node.value, "text keys")
            return INVALID
        return key


def _short_tag(tag: str) -> str:
    return tag.replace("tag:yaml.org,2002:", "!!")


def load_document(source: Any, *, source_name: str | None = None, what: str = "protocol",
                  error: Callable[[list[Problem]], Exception]) -> Document:
    """Read, parse and check the top level is a mapping; raise ``error(problems)`` if not.

    Problems found while building (duplicate keys, bad tags) are kept on the returned
    document in ``doc.build_problems`` so that the caller reports them with the rest.
    """
    text, label, problems = source_text(source, source_name=source_name, what=what)
    if problems:
        raise error(problems)
    assert text is not None
    doc, problems = parse(text, label, what=what)
    if doc is None:
        raise error(problems)
    if not isinstance(doc.value, dict):
        kind = "a list" if isinstance(doc.value, list) else f"a single value {describe(doc.value)}"
        raise error(problems + [Problem(
            label, doc.lines.get((), 1), "", None, f"a YAML mapping of {what} keys",
            f"the top level must be a mapping of {what} keys; got {kind}")])
    doc.build_problems = problems  # type: ignore[attr-defined]
    return doc
