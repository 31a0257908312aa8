"""The terminal view of ``steelyard layers``: a header and one row per layer."""

from __future__ import annotations

from rich.table import Table
from rich.text import Text

from steelyard.coverage import coverage_of, describe
from steelyard.graph import Checkpoint, Layer
from steelyard.inventory import stored_type_of
from steelyard.render.text import human_bytes, human_count, to_text
from steelyard.text_safety import shown


def _shape(layer: Layer) -> str:
    kernel = "×".join(str(k) for k in layer.kernel)
    base = f"{layer.units} × {layer.in_per_group}"
    if layer.groups > 1:
        base += f" (g={layer.groups})"
    return f"{base} × {kernel}" if kernel else base


def _parameters(layer: Layer) -> int:
    return layer.units * layer.fan_in + (layer.units if layer.bias else 0)


def render_layers(checkpoint: Checkpoint, *, color: bool = False, width: int = 120) -> str:
    """The header and layer table as text."""
    dtypes = ", ".join(f"{k} ×{v}" for k, v in sorted(checkpoint.dtypes.items()))
    header = Text.assemble(
        ("checkpoint ", "bold"),
        shown(checkpoint.path),
        "\n",
        ("format ", "bold"),
        checkpoint.format.value,
        ("   tensors ", "bold"),
        str(len(checkpoint.counted)),
        ("   parameters ", "bold"),
        f"{checkpoint.parameters:,}",
        ("   dtypes ", "bold"),
        dtypes or "none",
        ("   size ", "bold"),
        human_bytes(checkpoint.file_size),
    )
    table = Table(show_edge=False, header_style="bold", pad_edge=False)
    longest = max((len(shown(layer.name)) for layer in checkpoint.layers), default=5)
    table.add_column("layer", min_width=min(longest, 60), overflow="fold")
    # The stored-as column appears only when some weight is a decoded view (packed, GGUF).
    stored = {layer.name: stored_type_of(checkpoint, layer) for layer in checkpoint.layers}
    decoded = any(stored.values())
    columns = ("kind", "out × in × kernel", *(("stored as",) if decoded else ()), "activation",
               "fed by", "parameters")
    for column in columns:
        table.add_column(
            column,
            justify="right" if column == "parameters" else "left",
            overflow="fold",
        )
    for layer in checkpoint.layers:
        fed = ", ".join(shown(x) for x in layer.inputs_from) if layer.inputs_from else "—"
        table.add_row(
            shown(layer.name),
            layer.kind.value,
            _shape(layer),
            *((stored[layer.name] or "—",) if decoded else ()),
            layer.activation.value,
            f"{fed} ({layer.linked_by.value})" if layer.inputs_from else fed,
            human_count(_parameters(layer)),
        )
    parts: list[object] = [header, table]
    if not checkpoint.layers:
        parts = [header, Text("no layers with stored weights were recognised")]
    coverage = coverage_of(checkpoint)
    parts.append(Text.assemble(("coverage ", "bold"), describe(coverage)))
    if coverage.uncovered:
        names = ", ".join(shown(u.name) for u in coverage.uncovered[:8])
        more = f" and {len(coverage.uncovered) - 8:,} more" if len(coverage.uncovered) > 8 else ""
        parts.append(Text(f"in no layer: {names}{more}", style="dim"))
    parts += [Text(f"note: {shown(note)}", style="dim") for note in checkpoint.notes]
    return to_text(parts, color=color, width=width)  # type: ignore[arg-type]
