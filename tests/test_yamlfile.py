"""The one YAML reader of fill records, templates and band sets (phantometry.yamlfile).

Duplicate keys are refused because YAML 1.2 requires the keys of a mapping to be unique
(YAML 1.2.2 specification, section 3.2.1.1); merge keys keep their documented override
meaning (YAML merge key type, yaml.org/type/merge.html).
"""

from __future__ import annotations

import pytest

from phantometry.errors import FillRecordError, InputError
from phantometry.yamlfile import MAX_BYTES, MAX_DEPTH, parse_yaml_text, read_yaml_file


def parse(text: str):
    return parse_yaml_text(text, "f.yaml", InputError)


def refused(text: str) -> str:
    with pytest.raises(InputError) as exc:
        parse(text)
    message = str(exc.value)
    assert message.startswith("f.yaml: ") and "\n" not in message
    return message


def test_plain_documents_read_as_pyyaml_safe_load_does():
    assert parse("a: 1\nb: [x, y]\nc: {d: 2026-11-03T09:40:00+01:00}\n")["b"] == ["x", "y"]
    assert parse("") is None


def test_duplicate_key_refused_with_both_lines():
    message = refused("spheres:\n  ratio_to_background: 4\n  ratio_to_background: 8\n")
    assert "line 3, column 3" in message and "'ratio_to_background' appears twice" in message and "lines 2 and 3" in message


def test_duplicate_key_in_flow_mapping_and_at_top_level():
    assert "'low' appears twice" in refused("- {roi: a, low: 1, low: 2}\n")
    assert "'background' appears twice" in refused("background: 1\nnuclide: F-18\nbackground: 2\n")


def test_merge_keys_keep_their_override_meaning():
    data = parse("base: &b {p: 1, q: 2}\nitem:\n  <<: *b\n  p: 3\n")
    assert data["item"] == {"p": 3, "q": 2}


def test_nesting_deeper_than_the_limit_refused_without_recursion_error():
    assert parse("a: " + "[" * (MAX_DEPTH - 2) + "]" * (MAX_DEPTH - 2)) is not None
    assert f"nested more than {MAX_DEPTH} levels deep" in refused("a: " + "[" * 5000 + "]" * 5000)
    block = "".join(f"{'  ' * i}k{i}:\n" for i in range(400)) + "  " * 400 + "leaf: 1\n"
    assert "nested more than" in refused(block)


@pytest.mark.parametrize(
    "value, needle",
    [
        ("2026-13-45T09:40:00+01:00", "month must be in 1..12"),
        ("0000-01-01", "year 0 is out of range"),
        ("2026-11-03T09:40:00+25:00", "the UTC offset must be under 24 hours"),
        ("9" * 5000, "is not a valid integer"),
    ],
)
def test_impossible_values_refused_with_their_line(value, needle):
    message = refused(f"x: 1\nwhen: {value}\n")
    assert "line 2, column 7" in message and needle in message
    assert "timedelta" not in message and "set_int_max_str_digits" not in message


def test_control_character_named_with_line_and_column():
    assert "line 2, column 4: control character U+0001" in refused("a: 1\nb: \x01\n")


@pytest.mark.parametrize(
    "raw, needle",
    [
        ("a: 1\n".encode("utf-16"), "is UTF-16 text; save it as UTF-8"),
        ("a: 1\n".encode("utf-32"), "is UTF-32 text; save it as UTF-8"),
        ("a: 1\n".encode("utf-16-le"), "holds NUL bytes, so it is not UTF-8 text (UTF-16 without a byte-order mark?)"),
        ("a: 1\nnote: Ren\u00e9e\n".encode("latin-1"), "byte 0xE9 at line 2, column 10"),
    ],
)
def test_files_that_are_not_utf8_refused(tmp_path, raw, needle):
    path = tmp_path / "fill.yaml"
    path.write_bytes(raw)
    with pytest.raises(FillRecordError) as exc:
        read_yaml_file(path, FillRecordError, "fill record")
    assert str(exc.value).startswith(f"{path}: the fill record ") and needle in str(exc.value)


def test_utf8_byte_order_mark_accepted(tmp_path):
    path = tmp_path / "t.yaml"
    path.write_bytes(b"\xef\xbb\xbfa: 1\n")
    assert read_yaml_file(path, InputError, "template") == {"a": 1}


def test_oversized_file_and_folder_refused(tmp_path):
    big = tmp_path / "big.yaml"
    big.write_bytes(b"# " + b"x" * MAX_BYTES + b"\n")
    with pytest.raises(InputError, match="larger than 4 MB"):
        read_yaml_file(big, InputError, "band set")
    with pytest.raises(InputError, match="cannot read band set"):
        read_yaml_file(tmp_path, InputError, "band set")
