"""The terminal view of ``steelyard layers``: a header and one row per layer."""

from __future__ import annotations

from rich.console import RenderableType
from rich.text import Text

from steelyard.coverage import coverage_of
from steelyard.graph import Checkpoint, Layer
from steelyard.inventory import stored_type_of
from steelyard.render.fitting import ELLIPSIS, distinct_tails
from steelyard.render.grid import COMPACT_BELOW, Column, Grid, indented, labelled
from steelyard.render.text import count, coverage_line, human_bytes, plural, to_text
from steelyard.text_safety import shown


def _shape(layer: Layer) -> str:
    kernel = "×".join(str(k) for k in layer.kernel)
    base = f"{layer.units:,} × {layer.in_per_group:,}"
    if layer.groups > 1:
        base += f" (g={layer.groups})"
    return f"{base} × {kernel}" if kernel else base


def _parameters(layer: Layer) -> int:
    return layer.units * layer.fan_in + (layer.units if layer.bias else 0)


#: A producer's name in "fed by" longer than this is shown by its distinct tail.
_FED_NAME = 24


def _brief(name: str, tails: dict[str, str]) -> str:
    tail = tails.get(name, name)
    return name if len(name) <= _FED_NAME or tail == name else ELLIPSIS + tail


def render_layers(checkpoint: Checkpoint, *, color: bool = False, width: int = 120) -> str:
    """The header and layer table as text, no line wider than ``width``: layer names are
    shortened from the left to a tail no other layer ends with when they do not fit, and no
    word or name is broken in the middle (see :mod:`steelyard.render.grid`)."""
    dtypes = ", ".join(f"{k} ×{v:,}" for k, v in sorted(checkpoint.dtypes.items()))
    lines = [
        *labelled("checkpoint", shown(checkpoint.path), width),
        *labelled(
            "format",
            f"{checkpoint.format.value}, {human_bytes(checkpoint.file_size)}; "
            f"{plural(len(checkpoint.counted), 'tensor')}, "
            f"{plural(checkpoint.parameters, 'parameter')}",
            width,
        ),
        *labelled("dtypes", dtypes or "none", width),
    ]
    names = [shown(layer.name) for layer in checkpoint.layers]
    tails = distinct_tails(names)
    # The stored-as column appears only when some weight is a decoded view (packed, GGUF).
    stored = {layer.name: stored_type_of(checkpoint, layer) for layer in checkpoint.layers}
    decoded = any(stored.values())
    # Narrow terminals get "fed by" under its row instead of in a column; a column in which
    # every activation is unknown says nothing and is left out.
    compact = width < COMPACT_BELOW
    activations = any(layer.activation.value != "unknown" for layer in checkpoint.layers)
    grid = Grid(
        (
            Column("layer", wrap="name", floor=40, one_line=True),
            Column("kind"),
            Column("out × in × kernel"),
            *((Column("stored as"),) if decoded else ()),
            *((Column("activation"),) if activations else ()),
            *(() if compact else (Column("fed by", wrap="words", floor=16),)),
            Column("parameters", align="right"),
        ),
        tails=tails,
    )
    for name, layer in zip(names, checkpoint.layers, strict=True):
        fed = ", ".join(_brief(shown(x), tails) for x in layer.inputs_from) or "—"
        if layer.inputs_from:
            fed += f" ({layer.linked_by.value})"
        cells = [
            name,
            layer.kind.value,
            _shape(layer),
            *((stored[layer.name] or "—",) if decoded else ()),
            *((layer.activation.value,) if activations else ()),
        ]
        if compact:
            below = [(f"fed by {fed}", "dim")] if layer.inputs_from else []
            grid.add(*cells, count(_parameters(layer)), below=below)
        else:
            grid.add(*cells, fed, count(_parameters(layer)))
    if checkpoint.layers:
        lines += [Text(""), *grid.render(width)]
    else:
        lines.append(Text("no layers with stored weights were recognised"))
    coverage = coverage_of(checkpoint)
    lines += [Text(""), *labelled("coverage", coverage_line(coverage), width)]
    if coverage.uncovered:
        listed = ", ".join(shown(u.name) for u in coverage.uncovered[:8])
        more = f" and {len(coverage.uncovered) - 8:,} more" if len(coverage.uncovered) > 8 else ""
        lines += indented(f"in no layer: {listed}{more}", width, "dim", indent=0)
    for note in checkpoint.notes:
        lines += indented(f"note: {shown(note)}", width, "dim", indent=0)
    renderables: list[RenderableType] = list(lines)
    return to_text(renderables, color=color, width=width)
