"""Compact results: one row per respondent holds every detector's state, flag and score
(packed), the flag set as a bitmask of stable detector codes; the per-detector rows
with their evidence go. Evidence is derived on read by screening the respondent again (the
screening is deterministic given the answers, the version, the reference sample and the
screener); only the evidence of detectors that compare respondents with each other, where
the screening of the respondent alone would not give back, is kept (``kept_evidence``). The
answers digest and the screener fingerprint kept per respondent shrink to their first 64 bits,
and the answers become a byte per item of the respondent's version (``answer_codes``).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from __future__ import annotations

import json

import numpy as np
import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

#: The detectors known when this migration was written, in their order then (codes 0..21).
KNOWN = (
    "acquiescence", "extreme_style", "midpoint_style", "straightlining", "long_string",
    "mahalanobis", "response_variability", "even_odd", "missing_answers", "attention_checks",
    "speeding", "duplicate_answers", "sequence_pattern", "synonym_consistency",
    "antonym_consistency", "person_fit", "person_total", "scale_agreement",
    "person_scalability", "guttman_errors", "resampled_reliability", "log_likelihood_fit",
)
#: Of those, the ones whose evidence compares respondents with each other: the entries kept.
COMPARING = {
    "duplicate_answers": ("same_answers_count", "same_answers_as"),
    "speeding": ("relative_speed", "median_duration_seconds"),
}
#: The packed layout of one result (service.outcomes.PACKED at this revision).
PACKED = np.dtype([("code", "u1"), ("mark", "u1"), ("score", "<f8")])
CHUNK = 20_000


def upgrade() -> None:
    detector_codes = op.create_table(
        "detector_codes",
        sa.Column("code", sa.SmallInteger(), autoincrement=False, nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.PrimaryKeyConstraint("code"),
        sa.UniqueConstraint("name"),
    )
    with op.batch_alter_table("screening_history") as batch:
        batch.add_column(sa.Column("packed_results", sa.LargeBinary(), nullable=True))
        batch.add_column(sa.Column("versions", sa.JSON(), nullable=True))
    with op.batch_alter_table("respondents") as batch:
        batch.add_column(
            sa.Column("flag_bits", sa.BigInteger(), nullable=False, server_default="0")
        )
        batch.add_column(sa.Column("results", sa.LargeBinary(), nullable=True))
        batch.add_column(sa.Column("kept_evidence", sa.JSON(), nullable=True))
        batch.add_column(sa.Column("answer_codes", sa.LargeBinary(), nullable=True))
    connection = op.get_bind()
    names = list(KNOWN) + sorted(
        {row[0] for row in connection.execute(sa.text(
            "SELECT DISTINCT detector FROM detector_outcomes"
        ))} - set(KNOWN)
    )
    if len(names) > 63:
        raise RuntimeError(f"{len(names)} detector names; flag bits hold at most 63")
    op.bulk_insert(detector_codes, [{"code": c, "name": n} for c, n in enumerate(names)])
    codes = {name: code for code, name in enumerate(names)}
    _move_results(connection, codes)
    # Digests shortened to their first 64 bits (what the code computes from now on).
    connection.execute(sa.text(
        "UPDATE respondents SET answers_digest = substr(answers_digest, 1, 16), "
        "screened_with = substr(screened_with, 1, 16)"
    ))
    op.drop_table("detector_outcomes")
    _move_answers(connection)
    _drop_columns("respondents", ["flags", "answers"])


def _move_results(connection, codes: dict[str, int]) -> None:
    last = 0
    while True:  # bounded: every round moves past the largest id read
        pks = [row[0] for row in connection.execute(
            sa.text("SELECT id FROM respondents WHERE id > :last ORDER BY id LIMIT :n"),
            {"last": last, "n": CHUNK},
        )]
        if not pks:
            return
        low, high = pks[0], pks[-1]
        rows = connection.execute(
            sa.text(
                "SELECT respondent_pk, detector, state, flagged, score, evidence "
                "FROM detector_outcomes WHERE respondent_pk BETWEEN :low AND :high "
                "ORDER BY respondent_pk, detector"
            ),
            {"low": low, "high": high},
        ).all()
        by_pk: dict[int, list] = {}
        kept: dict[int, dict] = {}
        for pk, name, state, flagged, score, evidence in rows:
            by_pk.setdefault(pk, []).append((codes[name], state, flagged, score))
            if name in COMPARING and int(state) == 0:
                value = json.loads(evidence) if isinstance(evidence, str) else evidence
                kept.setdefault(pk, {})[str(codes[name])] = [
                    value.get(key) for key in COMPARING[name]
                ]
        updates = []
        for pk in pks:
            entries = sorted(by_pk.get(pk, []))
            packed = np.zeros(len(entries), dtype=PACKED)
            bits = 0
            for i, (code, state, flagged, score) in enumerate(entries):
                packed[i] = (
                    code, int(state) | (4 if flagged else 0), np.nan if score is None else score
                )
                if flagged:
                    bits |= 1 << code
            updates.append({
                "pk": pk, "bits": bits, "results": packed.tobytes(),
                "kept": json.dumps(kept[pk], separators=(",", ":")) if pk in kept else None,
            })
        connection.execute(
            sa.text(
                "UPDATE respondents SET flag_bits = :bits, results = :results, "
                "kept_evidence = :kept WHERE id = :pk"
            ),
            updates,
        )
        last = high


#: Stored answer bytes for an item left out, and for one sent as null (service.answers).
ABSENT, NULL = -128, -127


def _move_answers(connection) -> None:
    items = {
        vid: [item["id"] for item in (json.loads(doc) if isinstance(doc, str) else doc)["items"]]
        for vid, doc in connection.execute(sa.text("SELECT id, document FROM survey_versions"))
    }
    last = 0
    while True:  # bounded: every round moves past the largest id read
        rows = connection.execute(
            sa.text(
                "SELECT id, survey_version_id, answers FROM respondents WHERE id > :last "
                "ORDER BY id LIMIT :n"
            ),
            {"last": last, "n": CHUNK},
        ).all()
        if not rows:
            return
        updates = []
        for pk, version_id, answers in rows:
            given = json.loads(answers) if isinstance(answers, str) else answers
            codes = np.full(len(items[version_id]), ABSENT, dtype=np.int8)
            for j, item in enumerate(items[version_id]):
                if item in given:
                    codes[j] = NULL if given[item] is None else given[item]
            updates.append({"pk": pk, "codes": codes.tobytes()})
        connection.execute(
            sa.text("UPDATE respondents SET answer_codes = :codes WHERE id = :pk"), updates
        )
        last = rows[-1][0]


def _drop_columns(table: str, columns: list[str]) -> None:
    """Drop columns in place: on SQLite a batch operation would copy the table and drop the
    old one, and dropping ``respondents`` would cascade to the tables referring to it."""
    for column in columns:
        op.execute(f"ALTER TABLE {table} DROP COLUMN {column}")


def downgrade() -> None:
    op.create_table(
        "detector_outcomes",
        sa.Column("respondent_pk", sa.Integer(), nullable=False),
        sa.Column("detector", sa.String(length=64), nullable=False),
        sa.Column("detector_version", sa.String(length=32), nullable=False),
        sa.Column("state", sa.SmallInteger(), nullable=False),
        sa.Column("score", sa.Float(), nullable=True),
        sa.Column("cutoff", sa.Float(), nullable=True),
        sa.Column("flagged", sa.Boolean(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("evidence", sa.JSON(), nullable=False),
        sa.Column("sentence", sa.Text(), nullable=False),
        sa.Column("reference_id", sa.Integer(), nullable=True),
        sa.ForeignKeyConstraint(["reference_id"], ["reference_samples.id"], ondelete="SET NULL"),
        sa.ForeignKeyConstraint(["respondent_pk"], ["respondents.id"], ondelete="CASCADE"),
        sa.PrimaryKeyConstraint("respondent_pk", "detector"),
    )
    with op.batch_alter_table("respondents") as batch:
        batch.add_column(
            sa.Column("flags", sa.String(length=500), nullable=False, server_default="")
        )
    connection = op.get_bind()
    names: dict[int, str] = {
        int(code): str(name)
        for code, name in connection.execute(sa.text("SELECT code, name FROM detector_codes"))
    }
    rows = connection.execute(sa.text("SELECT id, results FROM respondents")).all()
    outcomes: list[dict] = []
    flags: list[dict] = []
    for pk, results in rows:  # the evidence and sentences are not restored (re-screen)
        packed = np.frombuffer(results or b"", dtype=PACKED)
        flags.append({"pk": pk, "flags": ",".join(
            names[int(p["code"])] for p in packed if p["mark"] & 4
        )})
        outcomes.extend(
            {
                "pk": pk, "name": names[int(p["code"])], "state": int(p["mark"]) & 3,
                "score": None if np.isnan(p["score"]) else float(p["score"]),
                "cutoff": None,
                "flagged": bool(p["mark"] & 4),
            }
            for p in packed
        )
    if flags:
        connection.execute(sa.text("UPDATE respondents SET flags = :flags WHERE id = :pk"), flags)
    if outcomes:
        connection.execute(
            sa.text(
                "INSERT INTO detector_outcomes (respondent_pk, detector, detector_version, "
                "state, score, cutoff, flagged, reason, evidence, sentence) VALUES (:pk, :name, "
                "'', :state, :score, :cutoff, :flagged, NULL, '{}', '')"
            ),
            outcomes,
        )
    with op.batch_alter_table("respondents") as batch:
        batch.add_column(sa.Column("answers", sa.JSON(), nullable=True))
    items = {
        vid: [item["id"] for item in (json.loads(doc) if isinstance(doc, str) else doc)["items"]]
        for vid, doc in connection.execute(sa.text("SELECT id, document FROM survey_versions"))
    }
    answers = [
        {"pk": pk, "answers": json.dumps({
            item: (None if code == NULL else code)
            for item, code in zip(items[vid], np.frombuffer(codes, np.int8).tolist(), strict=True)
            if code != ABSENT
        })}
        for pk, vid, codes in connection.execute(
            sa.text("SELECT id, survey_version_id, answer_codes FROM respondents")
        )
    ]
    if answers:
        connection.execute(
            sa.text("UPDATE respondents SET answers = :answers WHERE id = :pk"), answers
        )
    _drop_columns("respondents", ["kept_evidence", "results", "flag_bits", "answer_codes"])
    op.drop_table("detector_codes")
    _drop_columns("screening_history", ["versions", "packed_results"])
