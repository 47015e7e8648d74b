"""Where a key sits in a recipe's text: the TOML line that error messages point at."""

from __future__ import annotations

import re

__all__ = ["line_of"]


def line_of(text: str, key: str | None) -> int | None:
    """Best-effort TOML line for a dotted key, a quoted factor key, or a top-level key."""
    if not key:
        return None
    lines = text.splitlines()
    quoted = re.findall(r'"([^"]+)"', key)
    if key.startswith(("factors.", "exclude", "baseline.")) and quoted:
        for n, line in enumerate(lines, 1):
            if f'"{quoted[-1]}"' in line and "=" in line:
                return n
        return None
    parts = key.split(".")
    if len(parts) == 1:
        for n, line in enumerate(lines, 1):
            if re.match(rf'\s*"?{re.escape(parts[0])}"?\s*=', line) or re.match(
                rf"\s*\[\[?\s*{re.escape(parts[0])}\s*\]", line
            ):
                return n
        return None
    for cut in range(len(parts) - 1, 0, -1):  # "model.args.width": [model.args] width =, else [model] args =
        section, name, inside = ".".join(parts[:cut]), parts[cut], False
        for n, line in enumerate(lines, 1):
            header = re.match(r"\s*\[+\s*([^\]]+?)\s*\]+", line)
            if header:
                inside = header.group(1) == section
                continue
            if inside and re.match(rf'\s*"?{re.escape(name)}"?\s*=', line):
                return n
    for n, line in enumerate(lines, 1):
        if re.match(rf"\s*\[\s*{re.escape(parts[0])}\s*\]", line):
            return n
    return None
