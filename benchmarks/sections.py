"""Recording a benchmark's figures: its marked section of RESULTS.md and its key of results.json.

Each benchmark module owns one section between ``<!-- NAME:start -->`` and ``<!-- NAME:end -->``
and rewrites only that, so the modules can be run one at a time.
"""

from __future__ import annotations

import json
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent


def write_section(start: str, end: str, lines: Sequence[str], figures: Mapping[str, Any],
                  *, folder: Path = HERE) -> None:
    """Replace (or append) the section ``start..end`` of ``RESULTS.md`` with ``lines`` (which
    begin with ``start`` and finish with ``end``) and store each of ``figures`` under its key
    in ``results.json``."""
    results_md = folder / "RESULTS.md"
    text = results_md.read_text() if results_md.exists() else "# Benchmark results\n"
    section = "\n".join(lines)
    if start in text:
        text = re.sub(re.escape(start) + ".*?" + re.escape(end), lambda _: section, text,
                      flags=re.S)
    else:
        text = text.rstrip() + "\n\n" + section + "\n"
    results_md.write_text(text)
    results_json = folder / "results.json"
    stored = json.loads(results_json.read_text()) if results_json.exists() else {}
    stored.update(figures)
    results_json.write_text(json.dumps(stored, indent=2) + "\n")
