"""Safe YAML reading that remembers where every key stands.

Only plain YAML is accepted: mappings, sequences and the standard scalar types.
Tags that would construct objects are refused, and so are duplicate keys,
which a plain YAML reader silently overwrites. Every key path (``groups.farm.column``,
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


@dataclass(frozen=True)
class YamlDocument:
    """A parsed YAML file: its content, raw text and the line of each key path."""

    path: Path
    text: str
    content: object
    lines: dict = field(default_factory=dict)

    def where(self, key_path: str) -> str:
        """``file:line: key.path`` for messages; falls back to the nearest parent key."""
        probe = key_path
        while probe and probe not in self.lines:
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
    content = _convert(node, "", path, lines, yaml.SafeLoader(""))
    return YamlDocument(path, text, content, lines)


def _convert(node, key_path: str, path: Path, lines: dict, constructor):
    where = f"{path}:{node.start_mark.line + 1}"
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
            key = _convert(key_node, key_path, path, lines, constructor)
            if not isinstance(key, (str, int, float, bool)) or isinstance(key, bool):
                raise SpecError(f"mapping key {key!r} must be a plain name",
                                where=f"{path}:{key_node.start_mark.line + 1}: {key_path or '(top)'}")
            key = str(key)
            child = join(key_path, key)
            if key in out:
                raise SpecError(f"duplicate key {key!r}", where=f"{path}:{key_node.start_mark.line + 1}: {child}",
                                hint=f"it was already given on line {lines[child]}; keep one")
            lines[child] = key_node.start_mark.line + 1
            out[key] = _convert(value_node, child, path, lines, constructor)
        return out
    if isinstance(node, yaml.SequenceNode):
        items = []
        for i, item in enumerate(node.value):
            child = join(key_path, i)
            lines[child] = item.start_mark.line + 1
            items.append(_convert(item, child, path, lines, constructor))
        return items
    return constructor.construct_object(node, deep=True)
