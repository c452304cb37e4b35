"""Report sections that appear only when the runs call for them: compositions beside members, model age."""

from __future__ import annotations

from pathlib import Path

from logtrial.output.compositions import composition_section
from logtrial.output.model_age import model_age_section


def extra_sections(records: list[dict], store, out: Path) -> list[str]:
    """Markdown lines of the optional sections (empty when no composite or walk-forward run is present)."""
    return composition_section(records, store) + model_age_section(records, out)
