"""HTML built with escaping by default.

Every string that reaches the page goes through :func:`el` or :func:`esc`,
which escape ``& < > " '``; only values already wrapped in :class:`Raw` (the
output of these functions, or our own package files) pass through untouched.
Group labels, column names, titles and file names therefore always show as
text, never as markup.
"""
from __future__ import annotations

import html
from collections.abc import Iterable

__all__ = ["Raw", "esc", "el", "join"]

# Elements that have no closing tag (HTML Living Standard, "void elements").
_VOID = {"br", "hr", "img", "meta", "link", "col", "input", "wbr"}


class Raw(str):
    """A string that is already safe HTML."""


def esc(value) -> Raw:
    """Escape ``value`` (any object, shown with ``str``) unless it is :class:`Raw`."""
    if isinstance(value, Raw):
        return value
    return Raw(html.escape("" if value is None else str(value), quote=True))


def join(children) -> Raw:
    """Concatenate children, escaping each; ``None`` and ``False`` are skipped."""
    if children is None or children is False:
        return Raw("")
    if isinstance(children, str) or not isinstance(children, Iterable):
        return esc(children)
    return Raw("".join(join(child) for child in children))


def _attribute(name: str, value) -> str:
    name = name.rstrip("_").replace("_", "-")
    if value is True:
        return f" {name}"
    return f' {name}="{esc(value)}"'


def el(tag: str, *children, **attrs) -> Raw:
    """Return the element ``<tag attrs>children</tag>``.

    Attribute names are written with ``_`` turned into ``-`` (``aria_label``)
    and a trailing ``_`` dropped (``class_``). ``None`` and ``False`` attribute
    values are left out; ``True`` writes a bare attribute.
    """
    attributes = "".join(_attribute(k, v) for k, v in attrs.items()
                         if v is not None and v is not False)
    if tag in _VOID:
        return Raw(f"<{tag}{attributes}>")
    return Raw(f"<{tag}{attributes}>{join(children)}</{tag}>")
