"""Turning user text such as ``layer3:0-63,100`` into checked unit selections."""
from __future__ import annotations

from dataclasses import dataclass

from .errors import UnitlensError


@dataclass(frozen=True)
class LayerUnits:
    """The channels of one layer to study."""

    layer: str
    units: tuple[int, ...]


def parse_ranges(text: str, limit: int, what: str = "Channel", layer: str = "") -> tuple[int, ...]:
    """'0-3,7' -> (0, 1, 2, 3, 7), each checked against range(limit). Order kept, duplicates dropped."""
    out: list[int] = []
    for part in (p.strip() for p in text.split(",")):
        if not part:
            continue
        lo, sep, hi = part.partition("-")
        try:
            a = int(lo)
            b = int(hi) if sep else a
        except ValueError:
            raise UnitlensError(
                f"'{part}' is not a channel or range (expected e.g. 5 or 0-63). To give several "
                "layers with their own channels, repeat --layers, e.g. --layers layer3:0-9 --layers layer4."
            ) from None
        if a > b:
            raise UnitlensError(f"Range '{part}' runs backwards; write {b}-{a}.")
        for c in (a, b):
            if not 0 <= c < limit:
                where = f" for {layer}" if layer else ""
                raise UnitlensError(f"{what} {c} is out of range{where} (0-{limit - 1}).")
        out.extend(range(a, b + 1))
    if not out:
        raise UnitlensError(f"No channels given in '{text}'.")
    return tuple(dict.fromkeys(out))


def parse_layers(model, layers: list[str], units: str | None = None) -> tuple[LayerUnits, ...]:
    """Resolve --layers (repeatable; 'a,b' or 'a:0-9') and --units against the model.

    Every name is checked before any image is decoded, so a typo fails in the first second.
    """
    items: list[tuple[str, str | None]] = []
    for text in layers:
        text = text.strip()
        if ":" in text:
            name, _, spec = text.partition(":")
            items.append((name.strip(), spec))
        else:
            items.extend((n.strip(), None) for n in text.split(",") if n.strip())
    if not items:
        raise UnitlensError("No layers given. Run `unitlens layers MODEL` to list them.")
    out: dict[str, LayerUnits] = {}
    for name, spec in items:
        info = model.layer(name)
        if spec is not None and not spec.strip():
            raise UnitlensError(f"'{name}:' names no channels. Give them after the colon (e.g. {name}:0-63), or "
                                f"write just '{name}' for all {info.channels} of them.")
        spec = spec if spec is not None else units
        chosen = parse_ranges(spec, info.channels, layer=name) if spec is not None else tuple(range(info.channels))
        out[name] = LayerUnits(name, chosen)
    order = list(model.layers())
    return tuple(sorted(out.values(), key=lambda lu: order.index(lu.layer)))


def parse_unit(text: str) -> tuple[str, int]:
    """'layer3:37' -> ('layer3', 37)."""
    name, sep, ch = text.rpartition(":")
    if not sep or not name:
        raise UnitlensError(f"Expected LAYER:CHANNEL (e.g. layer3:37), got '{text}'.")
    try:
        return name, int(ch)
    except ValueError:
        raise UnitlensError(f"Channel must be a number in '{text}'.") from None


def ranges_text(units) -> str:
    """(0, 1, 2, 3, 7) -> '0-3,7' (the --units syntax)."""
    units = list(units)
    parts, i = [], 0
    while i < len(units):
        j = i
        while j + 1 < len(units) and units[j + 1] == units[j] + 1:
            j += 1
        parts.append(str(units[i]) if i == j else f"{units[i]}-{units[j]}")
        i = j + 1
    return ",".join(parts)


def run_layers(model, manifest: dict, layers: list[str] | None, units: str | None):
    """Resolve --layers/--units for a run folder: a layer named without channels (and no --units)
    gets the channels mined for it (or synthesised before); no --layers means all of those."""
    known = {name: ranges_text(u) for name, u in ((manifest.get("mine") or {}).get("settings") or {})
             .get("layers", {}).items()}
    for name, st in ((manifest.get("synth") or {}).get("layers") or {}).items():
        if st.get("channels"):
            known.setdefault(name, st["channels"])
    if not layers:
        if not known:
            raise UnitlensError("This run folder has no mined (or earlier synthesised) layers to default to; "
                                "name them with --layers (`unitlens layers MODEL` lists them).")
        if units:
            return parse_layers(model, list(known), units)
        return parse_layers(model, [f"{n}:{r}" for n, r in known.items()])
    items = []
    for text in layers:
        for name in ([text] if ":" in text else [n.strip() for n in text.split(",") if n.strip()]):
            items.append(f"{name}:{known[name]}" if ":" not in name and not units and name in known else name)
    return parse_layers(model, items, units)
