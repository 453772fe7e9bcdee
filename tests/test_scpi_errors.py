"""Error codes and error/event queue semantics."""

from __future__ import annotations

import pytest

from benchctl.scpi import (
    INTERRUPTED_QUERY,
    STANDARD_ERRORS,
    UNTERMINATED_QUERY,
    CommandTree,
    ErrorQueue,
    ScpiError,
    error_message,
    parse_error_response,
)

REQUIRED = [0, -100, -102, -103, -104, -105, -108, -109, -112, -113, -114, -120, -123, -124,
            -128, -131, -138, -141, -144, -148, -150, -151, -158, -160, -161, -168, -200, -210,
            -211, -213, -221, -222, -223, -224, -230, -240, -241, -310, -350, -363, -400, -410,
            -420, -430, -440]


def test_standard_table() -> None:
    # SCPI-1999 Vol. 2 §21.8 error/event numbers (from memory): a few messages checked
    # word for word, every required code present, classes by range.
    assert set(REQUIRED) <= set(STANDARD_ERRORS)
    assert STANDARD_ERRORS[-113] == "Undefined header"
    assert STANDARD_ERRORS[-222] == "Data out of range"
    assert STANDARD_ERRORS[-350] == "Queue overflow"
    assert STANDARD_ERRORS[0] == "No error"
    assert all(code <= 0 for code in STANDARD_ERRORS)
    assert error_message(-199) == "Command error"  # unlisted code: its class message
    assert error_message(-299) == "Execution error"
    assert error_message(-401) == "Query error"


def test_query_error_constants() -> None:
    # IEEE 488.2-1992 §6.3.2 / SCPI-1999 Vol. 2 §21.8.11 (from memory): -410 query
    # INTERRUPTED, -420 query UNTERMINATED.
    assert INTERRUPTED_QUERY == -410 and STANDARD_ERRORS[INTERRUPTED_QUERY] == "Query INTERRUPTED"
    assert UNTERMINATED_QUERY == -420 and STANDARD_ERRORS[UNTERMINATED_QUERY] == "Query UNTERMINATED"


def test_scpi_error_carries_code_and_info() -> None:
    exc = ScpiError(-222, "5 above 3")
    assert exc.code == -222 and exc.info == "5 above 3" and exc.message == "Data out of range"
    assert "-222" in str(exc)


def test_fifo_order_and_empty_reads() -> None:
    # SCPI-1999 Vol. 2 §21.8 (from memory): first in, first out; empty -> 0,"No error".
    q = ErrorQueue()
    q.push(-113, "FOO")
    q.push(-222)
    q.push(0)  # "no error" is not an entry
    assert len(q) == 2
    assert q.pop() == (-113, "Undefined header;FOO")
    assert q.format_next() == '-222,"Data out of range"'
    assert q.pop() == (0, "No error")
    assert q.format_next() == '0,"No error"'
    assert len(q) == 0


def test_overflow_replaces_the_last_entry() -> None:
    # SCPI-1999 Vol. 2 §21.8 (from memory): when full, the most recent error is replaced
    # by -350 "Queue overflow"; earlier errors stay, later ones are lost.
    q = ErrorQueue(capacity=4)
    for code in (-101, -102, -103, -104):
        q.push(code)
    assert q.codes() == [-101, -102, -103, -104]  # exactly full: no overflow yet
    q.push(-105)
    q.push(-108)
    assert q.codes() == [-101, -102, -103, -350]
    assert len(q) == 4
    assert [q.pop()[0] for _ in range(5)] == [-101, -102, -103, -350, 0]


def test_cls_clears_through_the_tree() -> None:
    # IEEE 488.2-1992 §10.3 *CLS clears the status structures incl. the queue (from memory).
    tree = CommandTree()
    tree.add("*CLS", set=lambda call: call.errors.clear())
    tree.add("SYSTem:ERRor[:NEXT]", query=lambda call: call.errors.format_next())
    q = ErrorQueue()
    tree.execute("BOGUS;ALSO:BOGUS", context=None, errors=q)
    assert q.codes() == [-113, -113]
    tree.execute("*CLS", context=None, errors=q)
    assert len(q) == 0
    assert parse_error_response(tree.execute("SYST:ERR?", context=None, errors=q)) == (0, "No error")


def test_queue_text_is_one_clean_response() -> None:
    q = ErrorQueue()
    q.push(-102, 'bad "quote"\nand newline ' + "x" * 400)
    text = q.format_next()
    assert "\n" not in text
    code, message = parse_error_response(text)  # still parses: no stray double quote
    assert code == -102
    assert len(message) <= 255  # SCPI-1999 Vol. 2 §21.8 (from memory): at most 255 chars


def test_capacity_validation() -> None:
    with pytest.raises(ValueError):
        ErrorQueue(capacity=1)
