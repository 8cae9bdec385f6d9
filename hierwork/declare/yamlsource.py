"""Safe YAML reading that remembers where every key stands.

Only plain YAML is accepted: mappings, sequences and the standard scalar types.
Tags that would construct objects are refused, and so are duplicate keys,
which a plain YAML reader silently overwrites. Hostile documents are refused
quickly: aliases that expand beyond :data:`MAX_NODES` values (a 1 KB "alias
bomb" expands to billions) and nesting deeper than :data:`MAX_DEPTH`. Every key path (``groups.farm.column``,
``predictors[1]``) is mapped to its line so that later checks can point at it.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import yaml

from hierwork.errors import SpecError

_PLAIN_TAGS = {
    "tag:yaml.org,2002:str",
    "tag:yaml.org,2002:int",
    "tag:yaml.org,2002:float",
    "tag:yaml.org,2002:bool",
    "tag:yaml.org,2002:null",
    "tag:yaml.org,2002:map",
    "tag:yaml.org,2002:seq",
}


#: Most values a spec may hold once aliases are expanded (a large batch spec holds a few thousand).
MAX_NODES = 100_000
#: Deepest nesting of mappings and sequences (a spec needs about 6).
MAX_DEPTH = 50


@dataclass(frozen=True)
class YamlDocument:
    """A parsed YAML file: its content, raw text and the line of each key path.

    ``origins`` maps key paths set from outside the file (``--set``, ``--chains``)
    to how they were set, so that messages blame the override, not the file.
    """

    path: Path
    text: str
    content: object
    lines: dict = field(default_factory=dict)
    origins: dict = field(default_factory=dict)

    def where(self, key_path: str) -> str:
        """``file:line: key.path`` for messages (``override K=V: key.path`` if set from outside);
        falls back to the nearest parent key."""
        probe = key_path
        while probe:
            if probe in self.origins:
                return f"{self.origins[probe]}: {key_path}"
            if probe in self.lines:
                break
            probe = probe.rsplit(".", 1)[0] if "." in probe else ""
        line = self.lines.get(probe)
        location = f"{self.path}:{line}" if line else str(self.path)
        return f"{location}: {key_path}" if key_path else location


def join(path: str, key) -> str:
    """Extend a key path by a mapping key or a sequence index."""
    if isinstance(key, int):
        return f"{path}[{key}]"
    return f"{path}.{key}" if path else str(key)


def read_yaml(path: Path, text: str | None = None) -> YamlDocument:
    """Read ``path`` (or ``text`` attributed to it) as plain YAML with key lines.

    Raises
    ------
    SpecError
        On unreadable files, YAML syntax errors, object-constructing tags and
        duplicate keys, each naming the file and line.
    """
    path = Path(path)
    if text is None:
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise SpecError("spec file not found", where=str(path),
                            hint="check the path; it is read relative to the current folder") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise SpecError(f"cannot read the spec file: {exc}", where=str(path)) from None
    loader = yaml.SafeLoader(text)
    try:
        _check_depth(text, path)
        node = loader.get_single_node()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else "?"
        raise SpecError(f"not valid YAML: {exc.problem or exc.context}", where=f"{path}:{line}",
                        hint="check indentation, colons and quotes on that line") from None
    except yaml.YAMLError as exc:
        raise SpecError(f"not valid YAML: {exc}", where=str(path)) from None
    finally:
        loader.dispose()
    lines: dict = {}
    if node is None:
        return YamlDocument(path, text, None, lines)
    content = _convert(node, "", path, lines, yaml.SafeLoader(""), [0], 0)
    return YamlDocument(path, text, content, lines)


def _check_depth(text: str, path: Path) -> None:
    """Refuse nesting beyond :data:`MAX_DEPTH` from the parser's events (before the recursive composer runs)."""
    depth = 0
    for event in yaml.parse(text, Loader=yaml.SafeLoader):
        if isinstance(event, yaml.CollectionStartEvent):
            depth += 1
            if depth > MAX_DEPTH:
                raise _too_deep(f"{path}:{event.start_mark.line + 1}")
        elif isinstance(event, yaml.CollectionEndEvent):
            depth -= 1


def _too_deep(where: str) -> SpecError:
    return SpecError(f"the YAML is nested more than {MAX_DEPTH} levels deep", where=where,
                     hint="a spec needs a handful of levels; check the brackets and indentation")


def _convert(node, key_path: str, path: Path, lines: dict, constructor, count: list, depth: int):
    """The node as plain Python values; ``count`` (one-item list) counts values across the document."""
    where = f"{path}:{node.start_mark.line + 1}"
    count[0] += 1
    if count[0] > MAX_NODES:
        raise SpecError(f"the YAML expands to more than {MAX_NODES:,} values (aliases repeated within aliases?)",
                        where=where, hint="write the values out, without '&' anchors used many times over")
    if node.tag not in _PLAIN_TAGS:
        raise SpecError(f"YAML tag {node.tag!r} is not allowed", where=f"{where}: {key_path or '(top)'}",
                        hint="specs hold plain values only: remove the '!' tag")
    if isinstance(node, yaml.MappingNode):
        out = {}
        for key_node, value_node in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                raise SpecError("YAML merge keys ('<<') are not supported",
                                where=f"{path}:{key_node.start_mark.line + 1}: {key_path or '(top)'}",
                                hint="write the keys out in full")
            key = _convert(key_node, key_path, path, lines, constructor, count, depth + 1)
            if not isinstance(key, (str, int, float, bool)) or isinstance(key, bool):
                raise SpecError(f"mapping key {key!r} must be a plain name",
                                where=f"{path}:{key_node.start_mark.line + 1}: {key_path or '(top)'}")
            key = str(key)
            child = join(key_path, key)
            if key in out:
                raise SpecError(f"duplicate key {key!r}", where=f"{path}:{key_node.start_mark.line + 1}: {child}",
                                hint=f"it was already given on line {lines[child]}; keep one")
            lines[child] = key_node.start_mark.line + 1
            out[key] = _convert(value_node, child, path, lines, constructor, count, depth + 1)
        return out
    if isinstance(node, yaml.SequenceNode):
        items = []
        for i, item in enumerate(node.value):
            child = join(key_path, i)
            lines[child] = item.start_mark.line + 1
            items.append(_convert(item, child, path, lines, constructor, count, depth + 1))
        return items
    return constructor.construct_object(node, deep=True)
