"""The quarantine log as a physicist works with it: list the quarantined files, release one once its cause is
fixed (the file moves back into the inbox and its content is no longer refused as "quarantined before")."""

from __future__ import annotations

import shutil
from pathlib import Path

from sqlalchemy import delete, select

from scorer.errors import LimenError
from scorer.qc.inbox import REASON_SUFFIX
from scorer.qc.tables import QuarantineRow


class ReleaseOps:
    """Listing and releasing quarantined files (mixed into :class:`Store`)."""

    def quarantine_entries(self) -> list[dict]:
        with self.transaction() as s:
            return [
                {
                    "id": r.id,
                    "sha256": r.sha256,
                    "path": r.original_path,
                    "moved_to": r.moved_to,
                    "reason": r.reason,
                    "at": r.at,
                }
                for r in s.scalars(select(QuarantineRow).order_by(QuarantineRow.id))
            ]

    def release_quarantined(self, entry_id: int, to=None) -> dict:
        """Move entry ``entry_id``'s file back (to its original path, or into folder ``to``), remove its reason
        file, and forget every quarantine record of its content, so the next run reads it afresh."""
        with self.transaction() as s:
            r = s.get(QuarantineRow, entry_id)
            if r is None:
                raise LimenError(f"no quarantine entry {entry_id} (see `limen quarantine list`)", "release")
            src = Path(r.moved_to) if r.moved_to else None
            if src is None or not src.exists():
                raise LimenError(
                    f"the quarantined file of entry {entry_id} is not there ({r.moved_to or 'never moved'})", "release"
                )
            dest = Path(to) / Path(r.original_path).name if to else Path(r.original_path)
            if dest.exists():
                raise LimenError(f"{dest} exists already: give --to another folder", "release")
            dest.parent.mkdir(parents=True, exist_ok=True)
            shutil.move(str(src), str(dest))
            src.with_name(src.name + REASON_SUFFIX).unlink(missing_ok=True)
            if r.sha256:
                s.execute(delete(QuarantineRow).where(QuarantineRow.sha256 == r.sha256))
            else:
                s.delete(r)
            return {"id": entry_id, "released_to": str(dest), "reason": r.reason}
