"""The TOML reader and validator: every error names the file, the section, the field, the value and
the rule; defaults apply only to fields not given; the parsed document is left as TOML made it."""

from __future__ import annotations

import copy
import json
import tomllib
from dataclasses import dataclass

import pytest

from cubecast.daemon.config import parse_toml, read_text, read_toml
from cubecast.daemon.errors import CubecastError

TEXT = """
[chirp]
slope_hz_per_s = -3
samples_per_chirp = 128
sample_rate_hz = 5.0e6
sampling = "complex"
swap_iq = false
id = "yard-a"
order = [0, 1, 2]
position_m = [1.0, 2, 3.5]
tx = [[0, 0], [4, 0.5]]
nan_value = nan
flag = 1
half = 2.0

[[target]]
name = "a"
[[target]]
name = "b"
"""


def doc():
    return parse_toml(TEXT, "yard_sensor.toml")


def chirp():
    return doc().section("chirp")


def raises(pattern):
    return pytest.raises(CubecastError, match=pattern)


# ---- reading --------------------------------------------------------------------------------------

def test_missing_file_named(tmp_path):
    with raises(r"^cannot read sensor description .*nope\.toml: No such file or directory$"):
        read_toml(tmp_path / "nope.toml", "sensor description")


def test_directory_named(tmp_path):
    with raises(r"^cannot read scene .*: Is a directory$"):
        read_text(tmp_path, "scene")


def test_not_utf8_named(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes(b'[sensor]\nid = "caf\xe9"\n')  # ISO 8859-1 e-acute: byte 0xe9 at offset 18 (9 + 9 bytes before it)
    with raises(r"^cannot read settings .*latin1\.toml: not UTF-8 text \(byte 18\)$"):
        read_toml(path, "settings")


def test_not_toml_named(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("a = = 1\n")
    with raises(r"bad\.toml: not valid TOML: .*line 1"):
        read_toml(path, "scene")
    with raises(r"^not valid TOML"):  # no origin: no prefix
        parse_toml("a = = 1\n")


def test_file_read_keeps_text_and_origin(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text(TEXT, encoding="utf-8")
    d = read_toml(path, "sensor description")
    assert d.text == TEXT and d.origin == str(path)
    assert json.dumps(d.data) == json.dumps(tomllib.loads(TEXT))  # json: nan == nan


# ---- sections -------------------------------------------------------------------------------------

def test_unknown_section_named_with_suggestion():
    with raises(r"^yard_sensor\.toml: unknown section \[chirp\] \(did you mean \[chirps\]\?\); see README$"):
        doc().check_sections({"chirps", "target"}, hint="see README")
    with raises(r"unknown sections \[chirp\], \[target\]"):
        doc().check_sections({"adc"})
    doc().check_sections({"chirp", "target", "adc"})


def test_missing_and_non_table_sections():
    with raises(r"^yard_sensor\.toml: missing section \[adc\]$"):
        doc().section("adc")
    empty = doc().section("adc", required=False)
    assert empty.number("full_scale", 8191.0) == 8191.0
    with raises(r"^x\.toml: adc = 3: must be a table \(\[adc\]\)$"):
        parse_toml("adc = 3\n", "x.toml").section("adc")


def test_arrays_of_tables():
    targets = doc().tables("target")
    assert [t.label for t in targets] == ["[[target]] #0", "[[target]] #1"]
    assert [t.string("name") for t in targets] == ["a", "b"]
    assert doc().tables("absent") == []
    with raises(r"target = 3: must be an array of tables \(\[\[target\]\] entries\)"):
        parse_toml("target = 3\n").tables("target")
    nested = parse_toml("[packet]\nsize = 4\n[[packet.field]]\nname = 'seq'\n", "l.toml").section("packet")
    (field,) = nested.tables("field", start=1)
    assert field.label == "[[packet.field]] #1"
    with raises(r"^l\.toml: \[\[packet\.field\]\] #1 name = 'seq': must be one of 'a'$"):
        field.choice("name", ("a",))
    nested.integer("size")
    nested.check_unknown()  # "field" was asked for


# ---- fields ---------------------------------------------------------------------------------------

def test_the_message_format():
    with raises(r"^yard_sensor\.toml: \[chirp\] slope_hz_per_s = -3: must be > 0$"):
        chirp().number("slope_hz_per_s", gt=0)


def test_numbers_and_bounds():
    c = chirp()
    assert c.number("sample_rate_hz", gt=0) == 5.0e6
    assert type(c.number("samples_per_chirp")) is float  # a TOML integer read as a number
    assert c.number("missing", 1.5) == 1.5
    assert c.number("missing", None) is None  # a default is returned unchecked
    with raises(r"\[chirp\] missing is missing$"):
        c.number("missing")
    with raises(r"nan_value = nan: must be a finite number$"):
        c.number("nan_value")
    with raises(r"id = 'yard-a': must be a finite number$"):
        c.number("id")
    with raises(r"swap_iq = False: must be a finite number$"):  # a bool is not a number
        c.number("swap_iq")
    with raises(r"slope_hz_per_s = -3: must be >= 0$"):
        c.number("slope_hz_per_s", ge=0)
    with raises(r"sample_rate_hz = 5000000.0: must be < 1e\+06$"):
        c.number("sample_rate_hz", lt=1e6)
    with raises(r"slope_hz_per_s = -3: must be in \[0, 50\]$"):
        c.number("slope_hz_per_s", ge=0, le=50)
    with raises(r"slope_hz_per_s = -3: must be in \(0, 0.5\)$"):
        c.number("slope_hz_per_s", gt=0, lt=0.5)


def test_integers():
    c = chirp()
    assert c.integer("samples_per_chirp", ge=8) == 128
    with raises(r"samples_per_chirp = 128: must be <= 64$"):
        c.integer("samples_per_chirp", le=64)
    with raises(r"half = 2.0: must be a whole number$"):
        c.integer("half")
    with raises(r"swap_iq = False: must be a whole number$"):
        c.integer("swap_iq")
    assert c.integer("missing", 0) == 0


def test_booleans_strings_choices():
    c = chirp()
    assert c.boolean("swap_iq") is False and c.boolean("missing", True) is True
    with raises(r"flag = 1: must be true or false$"):
        c.boolean("flag")
    assert c.string("id", pattern=r"[a-z-]+") == "yard-a"
    with raises(r"id = 'yard-a': must be letters only$"):
        c.string("id", pattern=r"[a-z]+", rule="must be letters only")
    with raises(r"flag = 1: must be a string$"):
        c.string("flag")
    assert c.choice("sampling", ("complex", "real")) == "complex"
    assert c.choice("missing", ("complex", "real"), "real") == "real"
    with raises(r"sampling = 'complex': must be one of 'real', 'iq'$"):
        c.choice("sampling", ("real", "iq"))


def test_lists_of_numbers():
    c = chirp()
    assert c.numbers("position_m", length=3) == [1.0, 2.0, 3.5]
    assert c.numbers("order", integer=True) == [0, 1, 2]
    assert c.numbers("missing", [0.0, 0.0, 0.0], length=3) == [0.0, 0.0, 0.0]
    with raises(r"position_m = \[1.0, 2, 3.5\]: must be a list of 2 finite numbers$"):
        c.numbers("position_m", length=2)
    with raises(r"position_m = \[1.0, 2, 3.5\]: must be a list of one or more whole numbers$"):
        c.numbers("position_m", integer=True)
    with raises(r"id = 'yard-a': must be a list of one or more finite numbers$"):
        c.numbers("id")
    assert c.number_rows("tx", 2) == [[0.0, 0.0], [4.0, 0.5]]
    with raises(r"tx\[0\] = \[0, 0\]: must be a list of 3 finite numbers$"):
        c.number_rows("tx", 3)
    with raises(r"order\[0\] = 0: must be a list of 3 finite numbers$"):
        c.number_rows("order", 3)
    with raises(r"id = 'yard-a': must be a non-empty list of \[x, z\] entries$"):
        c.number_rows("id", 2, columns="x, z")


def test_unknown_fields_named_with_suggestion():
    c = parse_toml("[link]\ntx_gain_dbi = 1.0\nantena_gain_dbi = 3\n", "l.toml").section("link")
    c.number("tx_gain_dbi")
    c.number("antenna_gain_dbi", 0.0)
    with raises(r"^l\.toml: \[link\] unknown field antena_gain_dbi \(did you mean antenna_gain_dbi\?\)$"):
        c.check_unknown()
    c2 = parse_toml("[link]\nx = 1\ny = 2\n").section("link")
    with raises(r"^\[link\] unknown fields x, y$"):
        c2.check_unknown()


def test_label_can_be_renamed():
    (t,) = parse_toml("[[target]]\nname = 'walker'\nrange_m = -1\n", "s.toml").tables("target")
    t.label += f" ({t.string('name')})"
    with raises(r"^s\.toml: \[\[target\]\] #0 \(walker\) range_m = -1: must be > 0$"):
        t.number("range_m", gt=0)


@dataclass(frozen=True)
class Example:
    window: str = "hann"
    fft_size: int = 0
    pfa: float = 1e-6
    static: bool = False


def test_dataclass_values():
    s = parse_toml("[p]\nfft_size = 64\npfa = 1\n", "p.toml").section("p")
    values = s.dataclass_values(Example)
    assert values == {"window": "hann", "fft_size": 64, "pfa": 1.0, "static": False}
    assert type(values["pfa"]) is float
    for text, pattern in (("static = 1", r"static = 1: must be true or false$"),
                          ("fft_size = 2.0", r"fft_size = 2.0: must be a whole number$"),
                          ("fft_size = true", r"fft_size = True: must be a whole number$"),
                          ("pfa = inf", r"pfa = inf: must be a finite number$"),
                          ("window = 3", r"window = 3: must be a string$"),
                          ("pf = 1e-3", r"^p\.toml: \[p\] unknown field pf \(did you mean pfa\?\)$")):
        with raises(pattern):
            parse_toml(f"[p]\n{text}\n", "p.toml").section("p").dataclass_values(Example)


def test_document_data_is_left_as_parsed():
    d = doc()
    before = copy.deepcopy(d.data)
    c = d.section("chirp")
    c.number("absent", 1.0)
    c.numbers("position_m", length=3)
    d.section("adc", required=False).boolean("swap_iq", False)
    assert json.dumps(d.data) == json.dumps(before) == json.dumps(tomllib.loads(TEXT))  # json: nan == nan


def test_settings_file_through_the_reader(tmp_path):
    # the processing settings are the dataclass section in use: file, section, field, value, rule
    from cubecast.daemon.settings import load_settings, parse_settings
    path = tmp_path / "settings.toml"
    path.write_text('[processing]\ncfar_kind = "ca"\ncfar_pfa = 1\nmin_range_m = 2\n')
    with raises(r"settings\.toml: \[processing\] cfar_pfa = 1\.0: must be between 0 and 0\.5$"):
        load_settings(path)
    path.write_text('[processing]\ncfar_kind = "ca"\nmin_range_m = 2\nremove_static = true\n')
    s = load_settings(path)
    assert (s.cfar_kind, s.min_range_m, s.remove_static, s.cfar_pfa) == ("ca", 2.0, True, 1e-6)
    with raises(r"^p\.toml: \[processing\] cfar_train_range = 'eight': must be a whole number$"):
        parse_settings('[processing]\ncfar_train_range = "eight"\n', "p.toml")
    with raises(r"^p\.toml: processing = 3: must be a table"):
        parse_settings("processing = 3\n", "p.toml")
    with raises(r"^p\.toml: unknown section \[proccessing\] \(did you mean \[processing\]\?\); settings live in"):
        parse_settings("[proccessing]\ncfar_pfa = 1e-3\n", "p.toml")
    with raises(r"^cannot read settings .*absent\.toml: No such file"):
        load_settings(tmp_path / "absent.toml")


def test_unknown_fields_checked_before_reading():
    # fields still to be read count as known, so a typo is named before any "is missing"
    t = parse_toml("[t]\nrang_m = 3.0\n", "s.toml").section("t")
    with raises(r"^s\.toml: \[t\] unknown field rang_m \(did you mean range_m\?\)$"):
        t.check_unknown(("range_m", "azimuth_deg"))
    ok = parse_toml("[t]\nrange_m = 3.0\n").section("t")
    ok.check_unknown(("range_m", "azimuth_deg"))
    assert ok.number("range_m", gt=0) == 3.0
