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
time. :func:`sharing_styles` keeps that cache for the process while a certificate's styles
are worked out: a tenth of a certificate's cost, with the same PDF bytes (tests/test_pdf.py
renders certificates one after another both ways and compares them).

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

It reproduces ``StyleFor.__init__`` of the WeasyPrint pinned in constraints.txt (FITS, the
same pin as svgtext.py's), with the cache as the only change; with any other version the
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

from pipeline.report.svgtext import FITS

log = logging.getLogger(__name__)

MAX_STYLES = 20_000  # a certificate needs a few hundred; emptied past this (memory stays flat)

_lock = threading.Lock()
_active: dict[str, Any] = {}  # while sharing_styles runs: the font configuration and its cache


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's style machinery, or None if this WeasyPrint is not the one this fits."""
    import weasyprint
    import weasyprint.css as css

    if weasyprint.__version__ != FITS:
        log.warning(
            "WeasyPrint %s is not %s: each certificate's styles are worked out anew (slower, same page)",
            weasyprint.__version__,
            FITS,
        )
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
    self._cascaded_styles = cascaded_styles = {}
    self._computed_styles = computed_styles = {}
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
        for name, values, importance in css.preprocess_declarations(base_url, declarations):
            precedence = css.declaration_precedence("author", importance)
            weight = (precedence, layer_order, specificity)
            old_weight = style.get(name, (None, None))[1]
            if old_weight is None or old_weight <= weight:
                style[name] = values, weight

    kept = _active.get("cache") if _active.get("font_config") is font_config else None
    if kept is not None and len(kept) > MAX_STYLES:
        kept.clear()
    computed_cache: dict[Any, Any] = {}
    for element in html.wrapper_element.iter_subtree():
        etree_element = element.etree_element
        parent = element.parent.etree_element if element.parent else None
        parent_id = id(computed_styles[parent, None]) if element.parent else None
        element_declarations = elements_declarations.get(etree_element)
        selectors_keys = []
        matched = []
        for sheet, origin, sheet_specificity in sheets:
            for selector in sheet.matcher.match(element):
                specificity, order, pseudo_type, (declarations, layer) = selector
                layer_order = inf if layer is None else sheet.layers.index(layer)
                selectors_keys.append((sheet, specificity, id(declarations), layer_order))
                matched.append((origin, sheet_specificity or specificity, pseudo_type, declarations, layer_order))
        key = (parent_id, element_declarations, tuple(selectors_keys))
        computed = computed_cache.get(key)
        kept_key = (parent_id, own.get(etree_element), tuple(selectors_keys))
        if computed is None and kept is not None:
            computed = kept.get(kept_key)  # the same style in an earlier document of this process
        # Add declarations for matching elements: an element whose style is found needs its
        # pseudo-elements' only (their styles are worked out below).
        for origin, specificity, pseudo_type, declarations, layer_order in matched:
            if computed is not None and pseudo_type is None:
                continue
            style = cascaded_styles.setdefault((etree_element, pseudo_type), {})
            for name, values, importance in declarations:
                precedence = css.declaration_precedence(origin, importance)
                weight = (precedence, layer_order, specificity)
                old_weight = style.get(name, (None, None))[1]
                if old_weight is None or old_weight <= weight:
                    style[name] = values, weight

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
