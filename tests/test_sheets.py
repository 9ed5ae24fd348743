"""Sample and calibration sheets: every problem is reported, all at once, one line each."""

import pytest

from ringid.jobs.sheets import SheetError, read_calibrations, read_samples, read_sheets


@pytest.fixture()
def folder(tmp_path):
    (tmp_path / "phases").mkdir()
    (tmp_path / "phases" / "Au.cif").write_text("data_Au\n")
    for name in ("a.tif", "b.tif", "cal.tif"):
        (tmp_path / name).write_bytes(b"II*\x00")
    return tmp_path


def write(path, text):
    path.write_text(text.strip() + "\n")
    return path


def test_good_sheets(folder):
    cals = write(folder / "cal.csv", """
calibration,image,standard,voltage_kv,camera_constant_A_px,camera_length_mm,pixel_size_um
film,cal.tif,Au,200,,,
known,,,200,1250.5,,
nominal,,,300,,800,14
""")
    samples = write(folder / "samples.csv", """
sample,image,calibration,voltage_kv,note
s1,a.tif,film,200,first film
s2,b.tif,nominal,,
""")
    s, c = read_sheets(samples, cals, folder / "phases")
    assert c["film"].kind == "standard" and c["film"].image == str((folder / "cal.tif").resolve())
    assert c["known"].kind == "constant" and c["known"].camera_constant_A_px == 1250.5
    assert c["nominal"].kind == "nominal" and c["nominal"].pixel_size_um == 14
    assert s["s1"].note == "first film" and s["s2"].calibration == "nominal"


def test_every_problem_reported_together(folder):
    cals = write(folder / "cal.csv", """
calibration,image,standard,voltage_kv
film,cal.tif,Au,200
film2,cal.tif,Pt,200
film3,missing.tif,Au,-5
bad id,cal.tif,Au,200
film,cal.tif,Au,abc
""")
    samples = write(folder / "samples.csv", """
sample,image,calibration,voltage_kv
s1,a.tif,film,200
s1,b.tif,film,200
a/b,a.tif,film,200
..,a.tif,film,200
with space,a.tif,film,200
s3,nothere.tif,film,200
s4,a.tif,nocal,200
s5,a.tif,film,x
""")
    with pytest.raises(SheetError) as err:
        read_sheets(samples, cals, folder / "phases")
    lines = str(err.value).splitlines()
    expected = [
        "standard 'Pt' is not a phase in",
        "image not found:",
        "voltage_kv must be a positive number, got -5",
        "calibration 'bad id' is not a safe file name",
        "duplicate calibration id 'film'",
        "duplicate sample id 's1'",
        "sample 'a/b' is not a safe file name",
        "sample '..' is not a safe file name",
        "sample 'with space' is not a safe file name",
        "nothere.tif",
        "unknown calibration id 'nocal'",
        "voltage_kv 'x' is not a number",
    ]
    for text in expected:
        assert any(text in line for line in lines), (text, lines)
    assert len(lines) == len(expected)
    assert all(line.startswith(str(folder)) for line in lines)


def test_missing_columns_and_missing_sheet(folder):
    bad = write(folder / "samples.csv", "sample,picture\ns1,a.tif\n")
    with pytest.raises(SheetError, match="missing column.s. image, calibration"):
        read_samples(bad)
    with pytest.raises(SheetError, match="sheet not found"):
        read_calibrations(folder / "none.csv")
    cal = write(folder / "cal.csv", "calibration,voltage_kv\nc1,200\n")
    with pytest.raises(SheetError, match="needs the columns"):
        read_calibrations(cal)


def test_a_misspelt_column_is_an_error_with_a_suggestion(folder):
    """A typo in an optional column (voltge_kv for voltage_kv) must not be ignored in silence: the
    sample would be measured with the default voltage, i.e. a wrong wavelength."""
    cals = write(folder / "cal.csv", """
calibration,image,standard,voltage_kv,pixel_size_mu
film,cal.tif,Au,300,
""")
    samples = write(folder / "samples.csv", """
sample,image,calibration,voltge_kv,notes,x_operator
s1,a.tif,film,300,first film,JD
""")
    with pytest.raises(SheetError) as info:
        read_sheets(samples, cals, folder / "phases")
    lines = info.value.lines
    assert len(lines) == 3, lines
    assert any(line.startswith(f"{samples}:1: unknown column 'voltge_kv' (did you mean 'voltage_kv'?)")
               for line in lines), lines
    assert any(line.startswith(f"{samples}:1: unknown column 'notes' (did you mean 'note'?)") for line in lines)
    assert any(line.startswith(f"{cals}:1: unknown column 'pixel_size_mu' (did you mean 'pixel_size_um'?)")
               for line in lines), lines
    assert not any("x_operator" in line for line in lines)  # a column of the user's own


def test_an_unrelated_column_lists_the_known_ones(folder):
    samples = write(folder / "samples.csv", """
sample,image,calibration,temperature
s1,a.tif,film,300
""")
    with pytest.raises(SheetError) as info:
        read_samples(samples)
    (line,) = info.value.lines
    assert line == (f"{samples}:1: unknown column 'temperature'; the columns are sample, image, calibration, "
                    "voltage_kv, note, elements (columns of your own: start their names with 'x_')")
