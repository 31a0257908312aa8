"""The chart runtime inlined into every HTML report: Vega, Vega-Lite and vega-embed, bundled
into one script by ``vl-convert-python`` (the ``html`` extra), so a report never fetches
anything.

Bundling runs a JavaScript bundler inside vl-convert and takes a few seconds, so the result is
kept in the user's cache folder, keyed by the vl-convert version; a cache that cannot be
written only costs the time again.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

from steelyard.errors import SteelyardError

#: The global the report's own script calls (vega-embed's default export).
EMBED_GLOBAL = "steelyardEmbed"
_SNIPPET = f"window.{EMBED_GLOBAL} = vegaEmbed;"
#: Vega-Lite version the chart specifications are written for.
VEGA_LITE = "6.4"


def _cache_dir() -> Path:
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "steelyard"


def chart_runtime() -> str:
    """The bundled chart scripts (about 0.9 MB of JavaScript), from the cache when present."""
    try:
        import vl_convert
    except ImportError:
        raise SteelyardError(
            "HTML reports need the chart runtime: pip install 'steelyard[html]'"
        ) from None
    from importlib.metadata import version

    release = version("vl-convert-python")
    key = hashlib.sha256(f"{release}\0{VEGA_LITE}\0{_SNIPPET}".encode()).hexdigest()[:16]
    cached = _cache_dir() / f"chart-runtime-{key}.js"
    try:
        text = cached.read_text(encoding="utf-8")
        if EMBED_GLOBAL in text[-200:]:  # a whole bundle, not a torn write
            return text
    except OSError:
        pass
    text = vl_convert.javascript_bundle(_SNIPPET, vl_version=VEGA_LITE)
    if "</script" in text.lower():
        # Inlined into a <script> element, this would end it early.
        raise SteelyardError("the chart runtime cannot be inlined: it contains '</script'")
    try:
        cached.parent.mkdir(parents=True, exist_ok=True)
        partial = cached.with_suffix(f".{os.getpid()}.tmp")
        partial.write_text(text, encoding="utf-8")
        os.replace(partial, cached)
    except OSError:
        pass
    return text
