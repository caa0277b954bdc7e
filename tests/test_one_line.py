"""The one helper that puts a message on one line, for every place that prints one."""

from __future__ import annotations

import tomllib

import pytest

from ergodex.exceptions import DataError, one_line
from ergodex.watching import _one_line as inbox_line


def test_a_message_from_another_library_is_put_on_one_line():
    # tomllib's own message for a bad line ends with "(at line N, column M)"
    with pytest.raises(tomllib.TOMLDecodeError) as info:
        tomllib.loads("a = 1\nb = [1,\n\n  2,,]\n")
    text = one_line(info.value)
    assert "\n" not in text and "  " not in text and text == " ".join(str(info.value).split())


def test_an_exception_without_a_message_gives_its_class_but_an_empty_text_stays_empty():
    assert one_line(KeyError()) == "KeyError"
    assert one_line(DataError("\n  a\tb \n")) == "a b"
    assert one_line("") == ""


def test_the_inbox_marks_what_ergodex_did_not_raise_on_purpose():
    assert inbox_line(DataError("bad\nrow")) == "bad row"
    assert inbox_line(ZeroDivisionError("x\ny")) == "internal error (ZeroDivisionError): x y"
