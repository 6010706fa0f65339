"""The README's accuracy tables, read by the tests that measure them, so a
number in the README is a number a test has checked."""

from pathlib import Path
from typing import Dict, List

README = Path(__file__).resolve().parent.parent / "README.md"


def readme_table(caption: str) -> Dict[str, List[str]]:
    """Body rows of the first table after the README line that starts with
    `caption`, keyed by their first cell."""
    lines = README.read_text(encoding="utf-8").splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith(caption))
    rows: Dict[str, List[str]] = {}
    body = False
    for line in lines[start + 1:]:
        if not line.startswith("|"):
            if body:
                break
            continue
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if set("".join(cells)) <= set("-: "):
            body = True  # the header's rule
            continue
        if body:
            rows[cells[0].strip("`")] = cells[1:]
    return rows


def half_unit(cell: str) -> float:
    """Half a unit of the last digit printed in `cell`: the rounding a
    printed number stands for."""
    decimals = len(cell.split(".")[1]) if "." in cell else 0
    return 0.5 * 10.0**-decimals + 1e-12
