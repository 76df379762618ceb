"""Darwin Core Archives and plain Darwin Core text, read as the TDWG Darwin Core text guide describes them.

Source for every archive here: TDWG Darwin Core text guide, https://dwc.tdwg.org/text/ -- section
2.2 (core attributes and their defaults: fieldsTerminatedBy ",", linesTerminatedBy "\\n",
fieldsEnclosedBy '"', ignoreHeaderLines 0, encoding UTF-8), section 2.4 (<field index term
default>: a field without an index is a constant column), and the section 3.1 example
(tab-separated core, <id index="0"/> beside a field on index 0, extensions linked by <coreId>).
"""

import codecs
import zipfile

import numpy as np
import pytest
from click.testing import CliRunner

from envelope.cli.main import cli
from envelope.errors import InputError
from envelope.io.records import read_occurrences

DWC = "http://rs.tdwg.org/dwc/terms/"

META_TAB = f"""<?xml version="1.0" encoding="UTF-8"?>
<archive xmlns="http://rs.tdwg.org/dwc/text/" metadata="eml.xml">
  <core encoding="UTF-8" fieldsTerminatedBy="\\t" linesTerminatedBy="\\n" fieldsEnclosedBy=""
        ignoreHeaderLines="1" rowType="{DWC}Occurrence">
    <files><location>occurrence.txt</location></files>
    <id index="0" />
    <field index="0" term="{DWC}occurrenceID"/>
    <field index="1" term="{DWC}scientificName"/>
    <field index="2" term="{DWC}decimalLatitude"/>
    <field index="3" term="{DWC}decimalLongitude"/>
    <field index="4" term="{DWC}occurrenceStatus" default="present"/>
    <field term="{DWC}basisOfRecord" default="HumanObservation"/>
  </core>
  <extension encoding="UTF-8" fieldsTerminatedBy="," linesTerminatedBy="\\n" fieldsEnclosedBy='"'
             ignoreHeaderLines="1" rowType="http://rs.gbif.org/terms/1.0/Multimedia">
    <files><location>multimedia.txt</location></files>
    <coreId index="0" />
    <field index="1" term="http://purl.org/dc/terms/identifier"/>
  </extension>
</archive>
"""

# the header line uses other names than the terms: the metafile, not the header, names the columns
CORE_TAB = ("id\tname\tlat\tlon\tstatus\n"
            "o1\tAus bus (Linnaeus, 1758)\t-40.25\t-149.75\t\n"
            "o2\tAus bus\t-40.75\t-149.25\tabsent\n"
            "o3\tAus bus\t-41.25\t-148.75\tpresent\n")


def _zip(path, files):
    with zipfile.ZipFile(path, "w") as zf:
        for name, data in files.items():
            zf.writestr(name, data)
    return path


def test_archive_core_read_as_its_metafile_declares(tmp_path):
    archive = _zip(tmp_path / "download.zip", {"meta.xml": META_TAB, "occurrence.txt": CORE_TAB,
                                               "multimedia.txt": "id,identifier\no1,x.jpg\n"})
    table = read_occurrences(archive)
    # three records: ignoreHeaderLines=1 skips the header line, the id column is also occurrenceID
    assert table["occurrenceID"].tolist() == ["o1", "o2", "o3"]
    assert table["x_record"].tolist() == [-149.75, -149.25, -148.75]
    assert table["y_record"].tolist() == [-40.25, -40.75, -41.25]
    # a default fills an empty cell; a field without index is a constant column (guide 2.4)
    assert table["occurrenceStatus"].tolist() == ["present", "absent", "present"]
    assert set(table["basisOfRecord"]) == {"HumanObservation"}
    read = table.attrs["read"]
    assert read["format"] == "Darwin Core Archive" and read["core"] == "occurrence.txt"
    assert read["delimiter"] == "\t" and read["header_lines"] == 1 and read["rows"] == 3
    assert read["extensions_ignored"] == ["http://rs.gbif.org/terms/1.0/Multimedia"]


def test_archive_defaults_quotes_and_declared_encoding(tmp_path):
    # no fieldsTerminatedBy / fieldsEnclosedBy / ignoreHeaderLines: the defaults "," '"' 0 apply;
    # the core file is Latin-1 as declared, and a quoted field holds the delimiter
    meta = (f'<archive xmlns="http://rs.tdwg.org/dwc/text/"><core encoding="ISO-8859-1" rowType="{DWC}Occurrence">'
            f'<files><location>data/occ.csv</location></files>'
            f'<field index="0" term="{DWC}scientificName"/><field index="1" term="{DWC}decimalLongitude"/>'
            f'<field index="2" term="{DWC}decimalLatitude"/><field index="3" term="{DWC}locality"/></core></archive>')
    core = '"Aus bus Müller, 1901",-149.75,-40.25,"Río Ficticio, left bank"\n'.encode("latin-1")
    table = read_occurrences(_zip(tmp_path / "a.zip", {"meta.xml": meta, "data/occ.csv": core}))
    assert table["scientificName"].tolist() == ["Aus bus Müller, 1901"]
    assert table["locality"].tolist() == ["Río Ficticio, left bank"]
    assert table.attrs["read"]["encoding"] == "ISO-8859-1" and table.attrs["read"]["quote"] == '"'


def test_archive_without_metafile_or_with_other_row_type_is_refused(tmp_path):
    with pytest.raises(InputError, match="zip without meta.xml"):
        read_occurrences(_zip(tmp_path / "plain.zip", {"occurrence.txt": CORE_TAB}))
    taxon = META_TAB.replace(f"{DWC}Occurrence", f"{DWC}Taxon")
    with pytest.raises(InputError, match="core rowType 'http://rs.tdwg.org/dwc/terms/Taxon' is not occurrence"):
        read_occurrences(_zip(tmp_path / "taxa.zip", {"meta.xml": taxon, "occurrence.txt": CORE_TAB}))
    missing = META_TAB.replace("occurrence.txt", "gone.txt")
    with pytest.raises(InputError, match="names core file 'gone.txt'"):
        read_occurrences(_zip(tmp_path / "gone.zip", {"meta.xml": missing, "occurrence.txt": CORE_TAB}))


def test_cli_exit_2_for_zip_without_metafile(tmp_path):
    grid = tmp_path / "g.tif"
    _tiny_grid(grid)
    res = CliRunner().invoke(cli, ["records", str(_zip(tmp_path / "x.zip", {"a.csv": "x"})), "--climate", str(grid)])
    assert res.exit_code == 2 and "zip without meta.xml" in res.output


@pytest.mark.parametrize("bom", [b"", codecs.BOM_UTF8])
@pytest.mark.parametrize("sep", [",", "\t"])
def test_plain_darwin_core_text_with_or_without_bom(tmp_path, bom, sep):
    # Source: Darwin Core text guide section 1.1 -- a text file whose first row holds the term names
    text = sep.join(["scientificName", "decimalLongitude", "decimalLatitude"]) + "\n" + \
        sep.join(["Aus bus", "-149.75", "-40.25"]) + "\n"
    path = tmp_path / ("r.csv" if sep == "," else "r.tsv")
    path.write_bytes(bom + text.encode("utf-8"))
    table = read_occurrences(path)
    assert list(table.columns[:3]) == ["scientificName", "decimalLongitude", "decimalLatitude"]
    assert table.attrs["read"]["byte_order_mark"] is bool(bom)
    assert table.attrs["read"]["delimiter"] == sep


def _tiny_grid(path):
    import xarray as xr
    import rioxarray  # noqa: F401

    from envelope.io.writing import write_raster

    data = np.arange(2 * 4 * 4, dtype=np.float32).reshape(2, 4, 4)
    da = xr.DataArray(data, dims=("variable", "y", "x"),
                      coords={"variable": ["t", "p"], "y": -40.0 - 0.5 * (np.arange(4) + 0.5),
                              "x": -150.0 + 0.5 * (np.arange(4) + 0.5)}).rio.write_crs("EPSG:4326")
    write_raster(da, path)
    return path


def test_records_command_reports_the_archive(tmp_path):
    archive = _zip(tmp_path / "download.zip", {"meta.xml": META_TAB, "occurrence.txt": CORE_TAB})
    grid = _tiny_grid(tmp_path / "g.tif")
    res = CliRunner().invoke(cli, ["records", str(archive), "--climate", str(grid), "--json"])
    assert res.exit_code == 0, res.output
    import json

    summary = json.loads(res.output)
    # constructed: o2 is absent, o1 and o3 fall in distinct cells of the 4 x 4 grid
    assert summary["input"]["core"] == "occurrence.txt"
    assert summary["read"] == 3 and summary["kept"] == 2 and summary["dropped"]["absent"] == 1
    assert summary["taxa"]["counts"] == {"Aus bus": 3}
