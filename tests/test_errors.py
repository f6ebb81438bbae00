"""SeqstateError.format(): one line whatever the message, path or record holds."""

from __future__ import annotations

from seqstate.errors import SeqstateError, SequenceFormatError, escape_text


def test_control_characters_are_escaped_not_echoed():
    # a record ID with a tab, a path with a newline and a cell with \x01 (common
    # practice: escapes as Python writes them)
    exc = SequenceFormatError(
        "character '\x01' found, then\ra carriage return",
        path="dir\nname.fa",
        line0=2,
        where="record 'a\tb'",
    )
    text = exc.format()
    assert text == (
        "dir\\nname.fa line 3, record 'a\\tb': character '\\x01' found, then\\ra carriage return"
    )
    assert text.isprintable()


def test_invisible_and_line_breaking_unicode_is_escaped():
    # bidirectional override U+202E, line separator U+2028, NEL U+0085, DEL
    text = escape_text("a\u202eb\u2028c\x85d\x7fe")
    assert text == "a\\u202eb\\u2028c\\x85d\\x7fe"


def test_undecodable_file_name_bytes_are_shown_as_bytes():
    # os.fsdecode of the bytes b"x\xff.fa" (surrogateescape) gives 'x\udcff.fa'
    exc = SeqstateError("file not found", path="x\udcff.fa")
    assert exc.format() == "x\\xff.fa: file not found"
    exc.format().encode("utf-8")  # printable on any UTF-8 terminal


def test_printable_text_is_kept():
    assert escape_text("Gène 5′ end: ok") == "Gène 5′ end: ok"
    assert SeqstateError("plain").format() == "plain"
