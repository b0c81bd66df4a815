"""Edit a layout file in place, keeping the clerk's comments, order and spacing.

Layout files belong to the person who wrote them: a tool that changes one value (``formread tune
--write-layout`` storing a threshold) must leave every other line as it was.  Edits go through
``tomlkit`` (a TOML library that keeps comments and formatting), the result is parsed and checked
like any layout before it replaces the file (atomically), so an edit never leaves a broken layout.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import tomlkit
from tomlkit.exceptions import TOMLKitError

from ..errors import LayoutError
from ..fileio import atomic_write
from .layout import Layout, parse_layout, read_layout_text

__all__ = ["edit_layout", "edit_text", "set_form_value", "set_header_fingerprint"]


def edit_text(text: str, change: Callable[[tomlkit.TOMLDocument], None], source: str = "<layout>"
              ) -> tuple[str, Layout]:
    """Layout TOML ``text`` with ``change`` applied to its tomlkit document, and the layout it now is.

    Raises LayoutError when the text is not TOML or would no longer be a valid layout."""
    try:
        doc = tomlkit.parse(text)
    except TOMLKitError as e:
        raise LayoutError(f"{source}: TOML syntax error: {str(e).splitlines()[0]}") from None
    change(doc)
    new = tomlkit.dumps(doc)
    return new, parse_layout(new, source)


def set_header_fingerprint(text: str, fingerprint: str, source: str = "<layout>") -> str:
    """Layout TOML ``text`` with ``[form.header] fingerprint`` set (replaced or added), everything else
    (comments included) kept; a bad fingerprint, or a layout without a ``[form.header]`` table, raises
    ``LayoutError("<source>: ...")``."""
    def change(doc):
        header = (doc.get("form") or {}).get("header")
        if not isinstance(header, dict):
            raise LayoutError(f"{source}: no [form.header] table (add x, y, w, h around the printed title first)")
        header["fingerprint"] = fingerprint

    new, layout = edit_text(text, change, source)
    if layout.header_fingerprint != fingerprint:
        raise LayoutError(f"{source}: the fingerprint could not be set in [form.header]")
    return new


def edit_layout(path, change: Callable[[tomlkit.TOMLDocument], None]) -> Layout:
    """Apply ``change`` to the layout file at ``path`` and write it back if it still parses.

    Parameters
    ----------
    path : path of a layout TOML file
    change : callable that edits the tomlkit document in place

    Returns
    -------
    Layout : the layout as written

    Raises
    ------
    LayoutError
        The file cannot be read, is not TOML, or would no longer be a valid layout (file unchanged).
    """
    path = Path(path)
    new, layout = edit_text(read_layout_text(path), change, str(path))
    atomic_write(path, new)
    return layout


def set_form_value(path, key: str, value: float, *, comment: str | None = None) -> Layout:
    """Set ``[form] <key> = value`` (e.g. ``threshold``), with an optional trailing comment.

    Every other line of the file stays as it was.  Raises LayoutError (file unchanged) when the
    file has no ``[form]`` table or the new value is not valid there.
    """
    def change(doc):
        form = doc.get("form")
        if not isinstance(form, dict):
            raise LayoutError(f"{path}: no [form] table to store {key!r} in")
        item = tomlkit.item(value)
        if comment:
            item.comment(comment)
        form[key] = item

    return edit_layout(path, change)
