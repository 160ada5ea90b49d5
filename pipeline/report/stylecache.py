"""Computed styles kept from one certificate to the next in a process, instead of built again.

Before it lays a document out, WeasyPrint works out every element's computed style: which
rules of which stylesheets match it, the cascade of their declarations, then every property
from the element's parent's style (``weasyprint.css.StyleFor``). Within one document it
already shares one style object among the elements whose parent style, style attributes and
matching rules are the same: such elements get the same computed values. A worker's
certificates are laid out with one parsed stylesheet and one font configuration (pdf.py's
``_shared``) and are built from the same templates, so the next certificate's elements meet
the same keys again, and the styles built for the last one (their properties computed lazily
as layout asked for them) would serve as they are; WeasyPrint starts from an empty cache each
time. :func:`sharing_styles` keeps, for the process, while a certificate's styles are worked
out:

- the computed styles, by WeasyPrint's own key (an element whose style is found skips the
  cascade of its declarations);
- the rules that match an element in a given place of a document (:class:`_Places`), so that
  an element in the same place of the next certificate is not matched against every selector
  again;
- and, for the certificate in hand, a pseudo-element's style is made only when layout asks for
  it (:class:`_PseudoOnDemand`).

Together about a fifth of a passed cell's certificate, with the same PDF bytes
(tests/test_pdf_fast_paths.py renders certificates one after another both ways and compares
them).

What a computed style depends on is the key's, or the same for every certificate of the
process: the parent's style (the key holds the id of the very object, kept alive by the
cache), the element's own declarations from its attributes (``lang``, ``id``, an SVG's size:
WeasyPrint makes new declaration objects for each document, so the key holds their text), the
matching rules (the stylesheets themselves, kept alive by the process, and their
declarations), and the base URL, font configuration and page size, which are the process's.
Documents laid out with other stylesheets or another font configuration (a lot report, the
benchmark's naive render) keep WeasyPrint's own per-document cache. The cache is emptied
whole when it grows past MAX_STYLES (nothing is ever dropped from it piecemeal, so no key can
outlive the object whose id it holds).

It reproduces ``StyleFor.__init__`` of the WeasyPrint pinned in constraints.txt (pinned.py's
FITS), with the cache as the only change; with any other version the
styles are worked out by WeasyPrint for every document (said once in the log), slower but the
same pages.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import threading
from collections.abc import Iterator
from math import inf
from typing import Any

from pipeline.report.pinned import weasyprint_fits

log = logging.getLogger(__name__)

MAX_STYLES = 50_000  # a certificate needs a few hundred styles and a few thousand places and
# rules; emptied past this (memory stays flat)

_lock = threading.Lock()
_active: dict[str, Any] = {}  # while sharing_styles runs: the font configuration and its cache


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's style machinery, or None if this WeasyPrint is not the one this fits."""
    import weasyprint.css as css

    if not weasyprint_fits("each certificate's styles are worked out anew"):
        return None
    return {"css": css, "original": css.StyleFor.__init__}


def _own_declarations(declarations: tuple[Any, ...]) -> tuple[str, ...]:
    """An element's declarations from its attributes, as text (equal for equal declarations)."""
    return tuple(d.serialize() for d in declarations)


def _style_for_init(
    self: Any, html: Any, sheets: Any, presentational_hints: Any, font_config: Any, target_collector: Any
) -> None:
    """``weasyprint.css.StyleFor.__init__`` of WeasyPrint FITS, its computed-style cache kept
    between documents laid out by :func:`sharing_styles` with its font configuration."""
    w = _weasyprint()
    assert w is not None, "sharing_styles() installs this only for the WeasyPrint it fits"
    css = w["css"]
    cascaded_styles: dict[Any, Any] = {}
    computed_styles: dict[Any, Any] = {}
    self._cascaded_styles, self._computed_styles = cascaded_styles, computed_styles
    self.initial_page_sizes = {"box": None, "area": None}
    self._sheets = sheets
    self.font_config = font_config

    css.PROGRESS_LOGGER.info("Step 3 - Applying CSS")
    layer_order = inf
    elements_declarations = {}
    own: dict[Any, tuple[str, ...]] = {}  # every attribute declaration of an element, as text
    for specificity, element, declarations, base_url in css.find_style_attributes(
        html.etree_element, presentational_hints, html.base_url
    ):
        style = cascaded_styles.setdefault((element, None), {})
        elements_declarations[element] = tuple(declarations)
        own[element] = own.get(element, ()) + _own_declarations(elements_declarations[element])
        _cascade(css, style, css.preprocess_declarations(base_url, declarations), "author",
                 specificity, layer_order)

    kept = _active.get("cache") if _active.get("font_config") is font_config else None
    if kept is not None and len(kept) > MAX_STYLES:
        kept.clear()
    places = _Places(kept, html.etree_element) if kept is not None else None
    sheets_key = tuple((sheet, origin, sheet_specificity) for sheet, origin, sheet_specificity in sheets)
    computed_cache: dict[Any, Any] = {}
    for element in html.wrapper_element.iter_subtree():
        etree_element = element.etree_element
        parent = element.parent.etree_element if element.parent else None
        parent_id = id(computed_styles[parent, None]) if element.parent else None
        element_declarations = elements_declarations.get(etree_element)
        place = None if places is None else places.of(element)
        pseudos: tuple[tuple[Any, dict[str, Any]], ...] | None = None
        if place is None:
            selectors_keys, matched = _rules(sheets, element)
        else:  # the rules that matched an element in this place before, if any did
            rules_key = ("rules", place, sheets_key)
            found = kept.get(rules_key)  # type: ignore[union-attr]
            if found is None:
                keys, rules = _rules(sheets, element)
                found = kept[rules_key] = (keys, rules, _pseudo_cascade(css, rules))  # type: ignore[index]
            selectors_keys, matched, pseudos = found
        key = (parent_id, element_declarations, selectors_keys)
        computed = computed_cache.get(key)
        kept_key = (parent_id, own.get(etree_element), tuple(selectors_keys))
        if computed is None and kept is not None:
            computed = kept.get(kept_key)  # the same style in an earlier document of this process
        # Add declarations for matching elements: an element whose style is found needs its
        # pseudo-elements' only (their styles are worked out below).
        for origin, specificity, pseudo_type, declarations, layer_order in matched:
            if (computed is not None and pseudo_type is None) or (pseudos is not None and pseudo_type):
                continue
            style = cascaded_styles.setdefault((etree_element, pseudo_type), {})
            _cascade(css, style, declarations, origin, specificity, layer_order)
        if pseudos is not None:  # the pseudo-elements' cascade of these rules, worked out once
            for pseudo_type, cascaded in pseudos:
                cascaded_styles[etree_element, pseudo_type] = cascaded

        # Store computed styles.
        if key in computed_cache:
            # Equivalent computed style already exists, share it.
            computed_styles[etree_element, None] = computed_cache[key]
            continue
        if computed is not None:
            computed_styles[etree_element, None] = computed_cache[key] = computed
            if target_collector and computed["anchor"]:
                target_collector.collect_anchor(computed["anchor"])
            continue
        # No equivalent computed style found, create it.
        self.set_computed_styles(
            etree_element, root=html.etree_element, parent=parent,
            base_url=html.base_url, target_collector=target_collector)
        computed_cache[key] = computed_styles[etree_element, None]
        if kept is not None:
            kept[kept_key] = computed_cache[key]

    # Then computed styles for pseudo elements, in any order (they inherit from their element).
    # In a kept document, a pseudo-element's style is worked out when layout first asks for it:
    # the stylesheet WeasyPrint applies to every document gives every element six of them
    # (::marker and the footnote and note ones), which a certificate never shows. One that
    # names an anchor is worked out at once, as WeasyPrint does, so that its anchor is collected.
    pending = {}
    for element, pseudo_type in cascaded_styles:
        if pseudo_type:
            cascaded = cascaded_styles[element, pseudo_type]
            if kept is not None and "anchor" not in cascaded:
                pending[element, pseudo_type] = cascaded
                continue
            self.set_computed_styles(
                element, pseudo_type=pseudo_type,
                # The pseudo-element inherits from the element.
                root=html.etree_element, parent=element,
                base_url=html.base_url, target_collector=target_collector)
    if pending:
        self._computed_styles = _PseudoOnDemand(computed_styles, pending, self, html)

    # Clear the cascaded styles, we don't need them anymore. Keep the
    # dictionary, it is used later for page margins.
    self._cascaded_styles.clear()


def _pseudo_cascade(css: Any, matched: tuple[Any, ...]) -> tuple[tuple[Any, dict[str, Any]], ...]:
    """The cascaded declarations of each pseudo-element that ``matched`` (``_rules``) gives an
    element, as the cascade in ``_style_for_init`` builds them, in the order they first appear.

    They depend on the rules alone, so the elements in a kept place share them (WeasyPrint's
    stylesheet gives every element six pseudo-elements, a cascade of their own each): nothing
    changes a cascaded style once it is made; a computed style reads it.
    """
    styles: dict[Any, dict[str, Any]] = {}
    for origin, specificity, pseudo_type, declarations, layer_order in matched:
        if not pseudo_type:
            continue
        _cascade(css, styles.setdefault(pseudo_type, {}), declarations, origin, specificity, layer_order)
    return tuple(styles.items())


def _cascade(
    css: Any, style: dict[str, Any], declarations: Any, origin: str, specificity: Any, layer_order: Any
) -> None:
    """Add ``declarations`` (name, values, importance) to a cascaded ``style``, each where its
    weight (precedence, layer, specificity) is at least that of what the style holds, as
    WeasyPrint's cascade adds them."""
    for name, values, importance in declarations:
        weight = (css.declaration_precedence(origin, importance), layer_order, specificity)
        old_weight = style.get(name, (None, None))[1]
        if old_weight is None or old_weight <= weight:
            style[name] = values, weight


def _rules(sheets: Any, element: Any) -> tuple[tuple[Any, ...], tuple[Any, ...]]:
    """The rules of ``sheets`` that match ``element``: WeasyPrint's key of them (each rule's
    sheet, specificity, declarations and layer) and what the cascade takes of each."""
    selectors_keys = []
    matched = []
    for sheet, origin, sheet_specificity in sheets:
        # Add declarations for matching elements.
        for selector in sheet.matcher.match(element):
            specificity, _order, pseudo_type, (declarations, layer) = selector
            layer_order = inf if layer is None else sheet.layers.index(layer)
            selectors_keys.append((sheet, specificity, id(declarations), layer_order))
            matched.append((origin, sheet_specificity or specificity, pseudo_type, declarations, layer_order))
    return tuple(selectors_keys), tuple(matched)


class _Places:
    """Numbers for an element's place in its document, the same for the same place in any
    document of the process: everything a selector can test of an element but its
    descendants (what the rules that match it depend on).

    A place is the element's name and attributes with those of all its siblings, in order,
    its position among them, whether it holds text or children, and its parent's place (so,
    up to the root, every ancestor and its siblings). Only what lies below an element is
    left out, which only ``:has()`` looks at: WeasyPrint's own stylesheet (FITS) has one,
    for a ``select``, and certificate.css none (a test checks it), so a document that holds
    a ``select`` gets no places (its rules are matched as WeasyPrint does). Nor do a plot
    (an SVG element) and what it holds: its points change from one certificate to the next.
    """

    def __init__(self, kept: dict[Any, Any], root: Any) -> None:
        self.kept = kept
        self.places: dict[int, int | None] = {}
        self.siblings: dict[int | None, int] = {}
        self.usable = not any(
            isinstance(e.tag, str) and e.tag.rpartition("}")[2] == "select" for e in root.iter()
        )

    def of(self, element: Any) -> int | None:
        """The place of a cssselect2 element wrapper, or None when places are not used."""
        if not self.usable:
            return None
        parent = element.parent
        parent_place = None if parent is None else self.places[id(parent.etree_element)]
        etree_element = element.etree_element
        if (parent is not None and parent_place is None) or str(etree_element.tag).startswith(_SVG):
            # a plot: its points differ from one certificate to the next, so its places would
            # only be kept to be left unused (the rules are matched as WeasyPrint does)
            self.places[id(etree_element)] = None
            return None
        # by the parent's element, which lives as long as the document (its wrapper may not)
        family = None if parent is None else id(parent.etree_element)
        names = self.siblings.get(family)
        if names is None:
            names = self.siblings[family] = self._number(
                ("siblings", tuple((e.tag, tuple(e.items())) for e in element.etree_siblings)))
        place = self._number(
            ("place", parent_place, names, element.index, bool(etree_element.text), len(etree_element) > 0))
        self.places[id(etree_element)] = place
        return place

    def _number(self, key: tuple[Any, ...]) -> int:
        number = self.kept.get(key)
        if number is None:
            number = self.kept[key] = len(self.kept)
        return int(number)



_SVG = "{http://www.w3.org/2000/svg}"


class _PseudoOnDemand(dict):  # type: ignore[type-arg]
    """A StyleFor's computed styles, whose pseudo-elements' styles are made on first asking.

    WeasyPrint asks for a computed style with ``get`` (``StyleFor.__call__``); each one made
    here is what ``StyleFor.set_computed_styles`` would have made of the same cascaded
    declarations, with no anchor to collect (none is declared, and an anchor is not inherited).
    """

    def __init__(self, computed: dict[Any, Any], pending: dict[Any, Any], style_for: Any, html: Any) -> None:
        super().__init__(computed)
        self.pending, self.style_for, self.html = pending, style_for, html

    def get(self, key: Any, default: Any = None) -> Any:
        cascaded = self.pending.pop(key, None)
        if cascaded is not None:
            element, pseudo_type = key
            css = _weasyprint()["css"]  # type: ignore[index]
            self[key] = css.ComputedStyle(
                self[element, None], cascaded, pseudo_type, self[self.html.etree_element, None],
                self.html.base_url, self.style_for.font_config, self.style_for.initial_page_sizes)
        return super().get(key, default)


@contextlib.contextmanager
def sharing_styles(font_config: Any, cache: dict[Any, Any]) -> Iterator[bool]:
    """Within the block, documents laid out with ``font_config`` take and leave their computed
    styles in ``cache`` (one per process: pdf.py's shared stylesheet and font); yields whether
    they do. One block at a time in a process (a lock); others wait."""
    w = _weasyprint()
    if w is None:
        yield False
        return
    style_for = w["css"].StyleFor
    with _lock:
        _active.update(font_config=font_config, cache=cache)
        style_for.__init__ = _style_for_init
        try:
            yield True
        finally:
            style_for.__init__ = w["original"]
            _active.clear()
