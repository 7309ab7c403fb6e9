"""Generated instrument documents, valid and broken: ``parse_instrument`` accepts a document or
raises ``InstrumentError`` whose every problem names the place in the document it concerns;
never another exception."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from detectors import InstrumentError, parse_instrument

from .instrument_documents import (
    broken_documents,
    location_parts,
    names_a_place,
    valid_documents,
)


@settings(max_examples=150, deadline=None)
@given(valid_documents())
def test_a_valid_document_is_accepted(document):
    instrument = parse_instrument(document)
    assert list(instrument.item_ids) == [item["id"] for item in document["items"]]


@settings(max_examples=400, deadline=None)
@given(broken_documents())
def test_a_broken_document_is_refused_with_every_problem_located(document):
    try:
        parse_instrument(document)
    except InstrumentError as error:
        assert error.problems
        for problem in error.problems:
            assert problem.message
            if isinstance(document, dict):
                # Within a document every problem names a field; only a value that is not a
                # document at all is refused as a whole (the empty location).
                assert problem.location, problem
            assert names_a_place(document, location_parts(problem.location)), (problem, document)


@given(st.sampled_from([[], "instrument", 7, None, True]))
def test_a_value_that_is_not_an_object_is_refused_as_a_whole(value):
    try:
        parse_instrument(value)
    except InstrumentError as error:
        assert [p.location for p in error.problems] == [""]
    else:
        raise AssertionError("accepted")
