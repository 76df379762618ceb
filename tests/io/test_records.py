"""Reading occurrence tables: Darwin Core and user-named columns, delimiters, broken rows, bad files."""

import numpy as np
import pytest

from tests.conftest import make_stack
from envelope.errors import InputError
from envelope.io.records import read_occurrences
from envelope.records import clean_occurrences

# Source: Darwin Core term names (Wieczorek et al. 2012, PLoS ONE 7: e29715; dwc quick reference guide).
HEADER = "occurrenceID,decimalLongitude,decimalLatitude,coordinateUncertaintyInMeters,eventDate,occurrenceStatus"


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def one_line_error(excinfo):
    message = str(excinfo.value)
    assert "\n" not in message
    return message


def test_darwin_core_csv(tmp_path):
    # Source: Darwin Core terms; decimalLongitude/decimalLatitude are WGS84 (EPSG:4326) by default.
    path = write(tmp_path, "records.csv", HEADER + "\nr1,-149.95,44.95,30,2001-05-03,present\n"
                                                    "r2,-149.85,44.85,,2002,\n")
    table = read_occurrences(path)
    assert table.attrs["crs"] == "EPSG:4326" and table.attrs["source"] == str(path)
    np.testing.assert_array_equal(table["x_record"], [-149.95, -149.85])
    np.testing.assert_array_equal(table["y_record"], [44.95, 44.85])
    assert table["occurrenceID"].tolist() == ["r1", "r2"]
    assert table["line"].tolist() == [2, 3]
    assert not table["malformed"].any()
    assert table["coordinateUncertaintyInMeters"].isna().tolist() == [False, True]  # empty field -> NaN


@pytest.mark.parametrize("name, sep", [("records.txt", "\t"), ("records.csv", ";"), ("records.tsv", "\t"),
                                       ("records.csv", "\t")])
def test_delimiter_sniffed(tmp_path, name, sep):
    # Common practice, no source: tab-separated Darwin Core exports are often named .csv or .txt.
    text = sep.join(["decimalLongitude", "decimalLatitude", "year"]) + "\n" + sep.join(["-149.5", "44.5", "2000"])
    table = read_occurrences(write(tmp_path, name, text + "\n"))
    assert table["x_record"].tolist() == [-149.5] and table["year"].tolist() == ["2000"]


def test_term_case_is_normalised_and_bom_ignored(tmp_path):
    # Common practice, no source: some exports write Darwin Core terms in lower case, with a BOM.
    path = tmp_path / "lower.csv"
    path.write_bytes("\ufeffdecimallongitude,DECIMALLATITUDE\n-149.5,44.5\n".encode("utf-8"))
    table = read_occurrences(path)
    assert {"decimalLongitude", "decimalLatitude"} <= set(table.columns)


def test_user_columns_with_crs(tmp_path):
    # Common practice, no source: projected coordinates need their CRS stated.
    path = write(tmp_path, "plots.csv", "plot,easting,northing\np1,405000,4980000\n")
    table = read_occurrences(path, x_column="easting", y_column="northing", crs="EPSG:32605")
    assert table.attrs["crs"] == "EPSG:32605"
    assert table["x_record"].tolist() == [405000.0]
    with pytest.raises(InputError, match="state their CRS") as info:
        read_occurrences(path, x_column="easting", y_column="northing")
    assert "plots.csv" in one_line_error(info)


def test_broken_rows_are_kept_and_counted_as_malformed(tmp_path):
    # Source: constructed file; counts follow from the construction (common practice, no source).
    text = (HEADER + "\n"
            "r1,-149.95,44.95,30,2001,present\n"
            "r2,-149.85,44.85\n"                      # too few fields
            "r3,-149.75,44.75,30,2001,present,extra\n"  # too many fields
            "r4,west,44.65,30,2001,present\n"         # not a number
            "r5,,44.55,30,2001,present\n"             # missing
            "r6,-149.45,144.55,30,2001,present\n"     # latitude out of range: flagged by the cleaning
            "r7,-149.35,44.35,30,2001,present\n")
    table = read_occurrences(write(tmp_path, "broken.csv", text))
    assert table["malformed"].tolist() == [False, True, True, True, True, False, False]
    records = clean_occurrences(table, make_stack())
    assert records.dropped["malformed"] == 5
    assert records.table["occurrenceID"].tolist() == ["r1", "r7"]


def test_missing_file(tmp_path):
    # Common practice, no source.
    with pytest.raises(InputError, match="nothere.csv: file not found") as info:
        read_occurrences(tmp_path / "nothere.csv")
    one_line_error(info)


def test_empty_file(tmp_path):
    # Common practice, no source.
    with pytest.raises(InputError, match="empty.csv: file is empty") as info:
        read_occurrences(write(tmp_path, "empty.csv", "\n  \n"))
    one_line_error(info)


def test_header_only(tmp_path):
    # Common practice, no source.
    with pytest.raises(InputError, match="holds a header but no records") as info:
        read_occurrences(write(tmp_path, "header.csv", HEADER + "\n"))
    one_line_error(info)


def test_no_header(tmp_path):
    # Common practice, no source: a first line of numbers is data, not column names.
    with pytest.raises(InputError, match="holds numbers, not column names") as info:
        read_occurrences(write(tmp_path, "bare.csv", "-149.5,44.5\n-149.4,44.4\n"))
    one_line_error(info)


def test_missing_coordinate_columns_lists_what_exists(tmp_path):
    # Common practice, no source: the message lists the columns found so the user can name them.
    path = write(tmp_path, "cols.csv", "id,xcoord,ycoord\n1,-149.5,44.5\n")
    with pytest.raises(InputError, match=r"no column 'decimalLongitude'; columns found: id, xcoord, ycoord") as info:
        read_occurrences(path)
    assert "cols.csv" in one_line_error(info)
    with pytest.raises(InputError, match="no column 'northing'"):
        read_occurrences(path, x_column="xcoord", y_column="northing", crs="EPSG:4326")


@pytest.mark.parametrize("names", [("Longitude", "Latitude"), ("lon", "lat"), ("LONG", "LAT"), ("lng", "lat")])
def test_plain_degree_column_names(tmp_path, names):
    # Common practice, no source: museum and field spreadsheets name degree columns plainly
    path = write(tmp_path, "plain.csv", f"id,{names[0]},{names[1]}\n1,-149.5,44.5\n2,-149.4,44.4\n")
    table = read_occurrences(path)
    assert (table.attrs["x_column"], table.attrs["y_column"]) == names
    assert table.attrs["read"]["degree_columns"] == list(names) and table.attrs["crs"] == "EPSG:4326"
    np.testing.assert_array_equal(table["x_record"], [-149.5, -149.4])
    # Darwin Core columns win over plain names; a projected CRS never takes plain names as degrees
    both = read_occurrences(write(tmp_path, "both.csv", f"decimalLongitude,decimalLatitude,{names[0]},{names[1]}\n"
                                                         "-149.5,44.5,0,0\n"))
    assert both.attrs["x_column"] == "decimalLongitude" and "degree_columns" not in both.attrs["read"]
    with pytest.raises(InputError, match="no column 'decimalLongitude'"):
        read_occurrences(path, crs="EPSG:32606")
    # two columns differing only in case are ambiguous: nothing is guessed
    with pytest.raises(InputError, match="no column 'decimalLongitude'"):
        read_occurrences(write(tmp_path, "twice.csv", "lon,LON,lat\n-149.5,-149.5,44.5\n"))


@pytest.mark.parametrize("crs", ["EPSG:999999", "not a crs", "+proj=nonsense"])
def test_nonsense_crs(tmp_path, crs):
    # Source: pyproj.CRS.from_user_input raises CRSError for these; we turn it into one line.
    path = write(tmp_path, "plots.csv", "easting,northing\n1,2\n")
    with pytest.raises(InputError, match="not understood by pyproj") as info:
        read_occurrences(path, x_column="easting", y_column="northing", crs=crs)
    assert "plots.csv" in one_line_error(info)


def test_no_usable_row(tmp_path):
    # Common practice, no source: when every row is broken the file is an error, not an empty result.
    path = write(tmp_path, "bad.csv", "decimalLongitude,decimalLatitude\nwest,north\n-149.5,\n")
    with pytest.raises(InputError, match=r"none of the 2 records has usable coordinates.*line 2: 'west'") as info:
        read_occurrences(path)
    one_line_error(info)


def test_duplicate_header_names(tmp_path):
    # Common practice, no source.
    with pytest.raises(InputError, match="column 'year' appears twice"):
        read_occurrences(write(tmp_path, "dup.csv", "decimalLongitude,decimalLatitude,year,year\n1,2,3,4\n"))


def _rows(n):
    return "".join(f"r{i},-149.{95 - i % 90:02d},44.55,30,2001,present\n" for i in range(n))


def test_a_stray_quote_breaks_one_row_not_the_rest(tmp_path):
    # Source: constructed file (issue 19: one stray quote once swallowed 454 of 459 rows); RFC 4180
    # section 2: a field that opens with a quote runs to the matching closing quote.
    rows = _rows(40).splitlines(keepends=True)
    rows[5] = rows[5].replace(",", ',"', 1)  # r5,"-149.90,... : the quote never closes
    table = read_occurrences(write(tmp_path, "stray.csv", HEADER + "\n" + "".join(rows)))
    assert len(table) == 40
    assert table["malformed"].tolist() == [i == 5 for i in range(40)]
    assert table["line"].tolist() == list(range(2, 42))


def test_a_quoted_line_break_is_one_record(tmp_path):
    # Source: RFC 4180 section 2 rule 6: fields with line breaks are enclosed in double quotes.
    text = HEADER + ',remarks\nr1,-149.95,44.95,30,2001,present,"seen at dusk\nnear the ridge"\n' \
                    'r2,-149.85,44.85,30,2001,present,none\n'
    table = read_occurrences(write(tmp_path, "remarks.csv", text))
    assert table["occurrenceID"].tolist() == ["r1", "r2"]
    assert table["remarks"].iloc[0] == "seen at dusk\nnear the ridge"
    assert not table["malformed"].any()


def test_many_broken_rows_stop_the_read(tmp_path):
    # Common practice, no source: more than 5 % broken rows (and more than 2) means a wrong
    # delimiter or quoting, refused with the first broken line named
    rows = _rows(40).splitlines(keepends=True)
    for i in (3, 9, 15):
        rows[i] = rows[i].replace(",", ';', 2)
    with pytest.raises(InputError, match=r"3 of 40 records have a wrong number of fields .*first at line 5") as info:
        read_occurrences(write(tmp_path, "semi.csv", HEADER + "\n" + "".join(rows)))
    one_line_error(info)


def test_a_device_is_not_read(tmp_path):
    # Common practice, no source: /dev/zero never ends; it is refused without reading it
    with pytest.raises(InputError, match="/dev/zero: not a regular file"):
        read_occurrences("/dev/zero")
    path = tmp_path / "bin.csv"
    path.write_bytes(b"decimalLongitude,decimalLatitude\n\x00\x01\x02")
    with pytest.raises(InputError, match="bin.csv: binary data"):
        read_occurrences(path)


SPREADSHEET_ROWS = ("occurrenceID;scientificName;decimalLongitude;decimalLatitude\n"
                    "r1;Aus bus (Müller, 1880);-149,95;44,95\n"
                    "r2;Aus bus (Müller, 1880);-149,85;44,85\n")


@pytest.mark.parametrize("encoding, label, bom", [("utf-16", "UTF-16", True), ("cp1252", "Windows-1252", False)])
def test_spreadsheet_encodings_read_as_their_text(tmp_path, encoding, label, bom):
    # Source: Python's codecs (the same text written in UTF-8 is the reference). A spreadsheet's
    # "Unicode text" export is UTF-16 with a byte-order mark; Western European CSV exports are
    # Windows-1252 (common practice, no source).
    text = ("occurrenceID\tscientificName\tdecimalLongitude\tdecimalLatitude\n"
            "r1\tAus bus (Müller, 1880)\t-149.95\t44.95\nr2\tAus bus (Müller, 1880)\t-149.85\t44.85\n")
    reference = read_occurrences(write(tmp_path, "ref.txt", text))
    path = tmp_path / f"{encoding}.txt"
    path.write_bytes(text.encode(encoding))
    table = read_occurrences(path)
    assert table.attrs["read"]["encoding"] == label and table.attrs["read"]["byte_order_mark"] is bom
    assert table["scientificName"].tolist() == ["Aus bus (Müller, 1880)"] * 2
    np.testing.assert_array_equal(table["x_record"], reference["x_record"])
    np.testing.assert_array_equal(table["y_record"], reference["y_record"])


def test_bytes_undefined_in_windows_1252_are_refused(tmp_path):
    # Source: the Windows-1252 code page leaves 0x81, 0x8D, 0x8F, 0x90 and 0x9D undefined
    path = tmp_path / "odd.csv"
    path.write_bytes(b"decimalLongitude,decimalLatitude,name\n-149.5,44.5,a\x81b\n")
    with pytest.raises(InputError, match=r"odd\.csv: not UTF-8 text \(byte 51\), nor Windows-1252") as info:
        read_occurrences(path)
    one_line_error(info)


def test_decimal_comma_degrees(tmp_path):
    # Common practice, no source: European spreadsheets write degrees with a decimal comma,
    # semicolon-separated or quoted; degrees (|value| <= 180) never carry thousands separators.
    semi = read_occurrences(write(tmp_path, "semi.csv", SPREADSHEET_ROWS))
    quoted = read_occurrences(write(tmp_path, "quoted.csv", 'decimalLongitude,decimalLatitude\n"-149,95","44,95"\n'
                                                             '"-149,85","44,85"\n'))
    for table in (semi, quoted):
        assert table.attrs["read"]["decimal_comma"] is True
        np.testing.assert_array_equal(table["x_record"], [-149.95, -149.85])
        np.testing.assert_array_equal(table["y_record"], [44.95, 44.85])
        assert not table["malformed"].any()
    # projected metres may carry thousands separators: a comma there is not read as a decimal mark
    with pytest.raises(InputError, match="none of the 1 records has usable coordinates"):
        read_occurrences(write(tmp_path, "metres.csv", 'e;n\n405,000;4980,000\n'),
                         x_column="e", y_column="n", crs="EPSG:32606")
    # a column that also holds decimal points is left as written: its comma row is malformed
    mixed = read_occurrences(write(tmp_path, "mixed.csv", "decimalLongitude;decimalLatitude\n-149.95;44.95\n"
                                                          "-149,85;44,85\n"))
    assert mixed["malformed"].tolist() == [False, True] and "decimal_comma" not in mixed.attrs["read"]
    # an empty coordinate field beside decimal-comma rows marks only its own row malformed
    gaps = read_occurrences(write(tmp_path, "gaps.csv", "decimalLongitude;decimalLatitude\n-149,95;44,95\n"
                                                         ";44,90\n-149,85;\n-149,80;44,80\n"))
    assert gaps.attrs["read"]["decimal_comma"] is True
    assert gaps["malformed"].tolist() == [False, True, True, False]
    np.testing.assert_array_equal(gaps["x_record"][[0, 3]], [-149.95, -149.80])


def test_longitudes_0_to_360_are_named(tmp_path, caplog):
    # Source: Darwin Core decimalLongitude is -180..180 (TDWG term definition); longitudes
    # counted 0..360 east are a frequent slip from climate-model grids (common practice).
    grid = make_stack()
    east = write(tmp_path, "east.csv", "decimalLongitude,decimalLatitude\n210.05,44.95\n210.15,44.85\n")
    with pytest.raises(InputError, match=r"2 records have a longitude in 180\.\.360 .*subtract 360") as info:
        clean_occurrences(read_occurrences(east), grid)
    one_line_error(info)
    some = write(tmp_path, "some.csv", "decimalLongitude,decimalLatitude\n-149.95,44.95\n210.15,44.85\n")
    with caplog.at_level("WARNING", logger="envelope.records"):
        kept = clean_occurrences(read_occurrences(some), grid)
    assert len(kept.table) == 1 and kept.dropped["malformed"] == 1
    assert any("1 records dropped as malformed; 1 records have a longitude in 180..360" in r.getMessage()
               for r in caplog.records)


def test_swapped_coordinate_columns_are_named_in_the_error(tmp_path):
    # Common practice, no source: latitudes beyond ±90 that would be valid longitudes suggest swapped columns
    path = write(tmp_path, "swapped.csv", "decimalLongitude,decimalLatitude\n44.95,-149.95\n44.85,-149.85\n")
    grid = make_stack()
    with pytest.raises(InputError, match=r"2 records have a latitude beyond ±90 .*columns swapped\?") as info:
        clean_occurrences(read_occurrences(path), grid)
    one_line_error(info)
