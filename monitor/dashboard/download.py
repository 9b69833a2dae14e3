"""The dashboard's audit page: which quarters to offer and the audit pack as a zip.

``monitor.audit.pack`` is imported only when used, so the dashboard still runs (without
the audit page) where it is not installed.
"""

from __future__ import annotations

import io
import tempfile
import zipfile
from datetime import date
from pathlib import Path

from monitor.config import Config


def audit_available() -> bool:
    try:
        from monitor.audit import pack as audit  # noqa: F401
    except ImportError:
        return False
    return hasattr(audit, "export")


def quarters(period: tuple[date, date]) -> list[str]:
    """Calendar quarters ("2025Q3") touching the period, newest first."""
    lo, hi = period
    out, (y, q) = [], (lo.year, (lo.month - 1) // 3 + 1)
    while (y, q) <= (hi.year, (hi.month - 1) // 3 + 1):
        out.append(f"{y}Q{q}")
        y, q = (y + 1, 1) if q == 4 else (y, q + 1)
    return out[::-1]


def build_audit_pack(
    config: Config, quarter: str, as_of: str | None, formats: list[str]
) -> tuple[bytes, dict]:
    """Run the audit export into a temporary folder and return (zip bytes, its result).

    Raises ImportError when ``monitor.audit.pack`` is not installed."""
    from monitor.audit.pack import export

    with tempfile.TemporaryDirectory(prefix="cuewatch-audit-") as tmp:
        out = Path(tmp) / f"audit-{quarter}"
        result = export(
            config, quarter=quarter, out_dir=out, as_of=as_of, formats=formats,
            include_rows=[], compare=None,
        )  # fmt: skip
        buf = io.BytesIO()
        with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
            for path in sorted(out.rglob("*")):
                if path.is_file():
                    zf.write(path, path.relative_to(out.parent))
    return buf.getvalue(), result
