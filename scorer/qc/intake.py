"""What the inbox scan records in the nightly database: the file-hash cache, new images, quarantined files."""

from __future__ import annotations

import json

from sqlalchemy import delete, insert, select, update

from scorer.qc.tables import FileRow, ImageRow, QuarantineRow, image_dict, utcnow


class IntakeOps:
    """Store operations of the inbox scan; each method is one transaction (mixed into :class:`Store`)."""

    def file_cache(self) -> dict:
        with self.transaction() as s:
            return {r.path: (r.size, r.mtime_ns, r.sha256) for r in s.scalars(select(FileRow))}

    def remember_files(self, rows: list[tuple[str, int, str, str]]) -> None:
        """(path, size, mtime_ns, sha256) rows into the file cache (insert or replace)."""
        if not rows:
            return
        values = [
            {"path": p, "size": n, "mtime_ns": m, "sha256": h} for p, n, m, h in dict((r[0], r) for r in rows).values()
        ]
        with self.transaction() as s:
            if self.is_sqlite or self.engine.dialect.name == "postgresql":
                # an upsert: two runs scanning the same inbox at once both remember its files (a delete then an
                # insert let the second run's insert hit the first's row on PostgreSQL: duplicate key)
                stmt = self._dialect_insert(FileRow.__table__)
                stmt = stmt.on_conflict_do_update(
                    index_elements=[FileRow.__table__.c.path],
                    set_={c: getattr(stmt.excluded, c) for c in ("size", "mtime_ns", "sha256")},
                )
                s.execute(stmt, values)
            else:  # pragma: no cover - other databases
                s.execute(delete(FileRow).where(FileRow.path.in_([v["path"] for v in values])))
                s.execute(insert(FileRow), values)

    def known_images(self, shas) -> dict:
        """sha256 → path recorded, for the given hashes that are already in the database."""
        shas = list(shas)
        out = {}
        with self.transaction() as s:
            for i in range(0, len(shas), 500):
                out.update(
                    dict(
                        s.execute(
                            select(ImageRow.sha256, ImageRow.path).where(ImageRow.sha256.in_(shas[i : i + 500]))
                        ).all()
                    )
                )
        return out

    def quarantined(self, shas) -> dict:
        """sha256 → reason, for contents quarantined before."""
        shas = [h for h in shas if h]
        out = {}
        with self.transaction() as s:
            for i in range(0, len(shas), 500):
                out.update(
                    dict(
                        s.execute(
                            select(QuarantineRow.sha256, QuarantineRow.reason).where(
                                QuarantineRow.sha256.in_(shas[i : i + 500])
                            )
                        ).all()
                    )
                )
        return out

    def add_images(self, images) -> int:
        """Insert new inbox images; an image already present (same content) is left alone."""
        if not images:
            return 0
        now = utcnow()
        rows = [
            {
                "sha256": im.sha256,
                "path": im.path,
                "detector": im.detector,
                "group_key": im.group_key,
                "session_date": im.session_date,
                "acquired": im.acquired,
                "detector_id": im.detector_id,
                "device_serial": im.device_serial,
                "station_name": im.station_name,
                "kvp": im.kvp,
                "exposure_uas": im.exposure_uas,
                "anode": im.anode,
                "filter": im.filter,
                "flags": json.dumps(im.flags),
                "first_seen": now,
            }
            for im in images
        ]
        with self.transaction() as s:
            res = s.execute(self._insert(ImageRow.__table__), rows)
            return int(res.rowcount or 0)

    def record_quarantine(self, sha256, original_path, moved_to, reason) -> None:
        """Record a quarantined file (completing the record a released session left, if there is one)."""
        moved = None if moved_to is None else str(moved_to)
        with self.transaction() as s:
            res = s.execute(
                update(QuarantineRow)
                .where(
                    QuarantineRow.sha256 == sha256,
                    QuarantineRow.original_path == str(original_path),
                    QuarantineRow.moved_to.is_(None),
                )
                .values(moved_to=moved)
            )
            if not res.rowcount:
                s.add(
                    QuarantineRow(
                        sha256=sha256, original_path=str(original_path), moved_to=moved, reason=reason, at=utcnow()
                    )
                )

    def free_groups(self) -> dict:
        """group_key → images not bound to any session (dicts), oldest first."""
        with self.transaction() as s:
            rows = s.scalars(select(ImageRow).where(ImageRow.session_id.is_(None)).order_by(ImageRow.id)).all()
        out: dict = {}
        for r in rows:
            out.setdefault(r.group_key, []).append(image_dict(r))
        return out
