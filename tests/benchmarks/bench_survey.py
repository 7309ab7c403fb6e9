"""The invented survey the storage and export benchmarks register: k five-point labelled items
in scales (and pages) of ten, keyed alternately."""

from __future__ import annotations

LABELS = ["Strongly disagree", "Disagree", "Neither", "Agree", "Strongly agree"]


def bench_document(survey: str, title: str, k: int) -> dict:
    items = [
        {"id": f"q{i + 1:02d}", "text": f"Statement {i + 1} of the {title.lower()} survey",
         "scale": f"s{i // 10}", "keyed": 1 if i % 2 == 0 else -1, "block": f"page{i // 10}"}
        for i in range(k)
    ]
    return {"survey": survey, "title": title, "items": items,
            "response_format": {"points": 5, "lowest": 1, "labels": LABELS}}
