"""Summary table and HTML report from a results folder."""

import csv
import json

from ringid.core.model import Geometry
from ringid.core.records import SampleRecord, write_sample_record
from ringid.report.summary import SUMMARY_COLUMNS
from ringid.report.html import write_report


def make_results(tmp_path):
    res = tmp_path / "results"
    good = res / "samples" / "s1"
    good.mkdir(parents=True)
    write_sample_record(good / "sample.json", SampleRecord(
        "s1", crystallinity="crystalline", n_rings=6, calibration="c1", note='<script>alert("note")</script>',
        geometry=Geometry(10.25, 11.5, 0.012), g_range_per_nm=(1.0, 40.0), crystallite_size_nm=12.34,
        flags=("textured",)))
    (good / "identification.json").write_text(json.dumps({
        "phases": ["Au"], "confidence": [0.61], "alternatives": [["Ag"]], "unexplained_rings": 1,
        "fractions_rough": [1.0], "flags": ["ambiguous_isostructural"], "unexplained": [{"d_angstrom": 3.1}]}))
    (good / "rings.csv").write_text("g_per_nm,d_angstrom,kind,phase,hkl\n4.247,2.3546,ring,Au,1 1 1\n")
    bad = res / "samples" / "s2"
    bad.mkdir(parents=True)
    write_sample_record(bad / "sample.json", SampleRecord("s2", status="failed", error="img.tif: not an image"))
    (res / "samples" / "s3").mkdir(parents=True)  # the image job never finished
    (res / "library").mkdir()
    (res / "library" / "index.csv").write_text(
        "phase,formula,space_group,a,b,c,alpha,beta,gamma,n_rings,cif_sha256,status,error,title\n"
        'X,Au,F m -3 m,4,4,4,90,90,90,5,abc,ok,,"<script>t</script> & ""q"""\n'
    )
    (res / "calibrations").mkdir()
    (res / "calibrations" / "c1.json").write_text(
        json.dumps({"status": "ok", "camera_constant_A_px": 1003.2, "kind": "standard"})
    )
    return res


def test_summary_rows_and_failures(tmp_path):
    res = make_results(tmp_path)
    write_report(res, ["s1", "s2", "s3"], ["c1"])
    with open(res / "summary.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == SUMMARY_COLUMNS
    s1, s2, s3 = rows
    assert (s1["status"], s1["phases"], s1["alternatives"], s1["confidence"]) == ("ok", "Au", "Ag", "0.610")
    assert s1["flags"] == "textured;ambiguous_isostructural" and s1["unexplained_rings"] == "1"
    assert s1["center_x_px"] == "10.250" and s1["crystallite_size_nm"] == "12.3"
    assert (s2["status"], s2["error"]) == ("failed", "img.tif: not an image")
    assert s3["status"] == "failed" and "did not finish" in s3["error"]
    assert s2["crystallinity"] == s3["crystallinity"] == ""  # nothing was measured


def test_report_escapes_untrusted_text(tmp_path):
    res = make_results(tmp_path)
    page = write_report(res, ["s1", "s2", "s3"], ["c1"], title="run <b>1</b>").read_text()
    assert "<script>alert" not in page and "&lt;script&gt;alert(&quot;note&quot;)&lt;/script&gt;" in page
    assert "&lt;script&gt;t&lt;/script&gt; &amp; &quot;q&quot;" in page
    assert "<title>run &lt;b&gt;1&lt;/b&gt;</title>" in page
    assert page.count("<script>") == 1  # only the page's own sorting/filtering script
    assert "screening result" in page.lower()


def test_unexplained_rings_mismatches_and_rejections_are_said_plainly(tmp_path):
    res = make_results(tmp_path)
    ident = json.loads((res / "samples" / "s1" / "identification.json").read_text())
    ident.update({"unexplained": [{"d_angstrom": 3.1}, {"d_angstrom": 1.9876}], "unexplained_intensity_share": 0.4,
                  "false_identification_probability": [0.0012],
                  "lattice_mismatch": [{"phase": "Cu", "dilation": 1.0071, "dilation_sigma": 0.0002, "score": 30.0}],
                  "not_significant": [{"phase": "NiO", "score": 12.0, "false_identification_probability": 0.08}]})
    (res / "samples" / "s1" / "identification.json").write_text(json.dumps(ident))
    page = write_report(res, ["s1", "s2", "s3"], ["c1"]).read_text()
    assert "rings not explained by the library</b> (40% of the ring intensity): d = 3.1000, 1.9876 Å" in page
    assert "Cu fits only with its lattice scaled by +0.71 ± 0.02 %" in page
    assert "NiO was not reported" in page and "probability 0.08" in page
    with open(res / "summary.csv", newline="") as fh:
        s1 = next(csv.DictReader(fh))
    assert s1["unexplained_d_angstrom"] == "3.1000;1.9876"
    assert s1["unexplained_intensity_share"] == "0.400" and s1["false_identification_probability"] == "0.0012"


def test_a_cif_that_did_not_build_is_named_at_the_top_of_the_report(tmp_path):
    res = make_results(tmp_path)
    with open(res / "library" / "index.csv", "a", encoding="utf-8") as fh:
        fh.write("Bad,,,,,,,,,0,def,failed,the space group cannot be resolved,\n")
    page = write_report(res, ["s1", "s2", "s3"], ["c1"]).read_text()
    note = page.index("Library incomplete.")
    assert note < page.index('<h2 id="summary-section">Summary</h2>')
    assert "<b>Bad</b> (the space group cannot be resolved)" in page[note:note + 400]


def test_report_structure_links_box_and_failure_banner(tmp_path):
    """Sample names in the summary link to their sections and each section links back; the summary
    table scrolls in its own box (header kept visible); failed samples are named at the top."""
    import re

    res = make_results(tmp_path)
    page = write_report(res, ["s1", "s2", "s3"], ["c1"]).read_text()
    box = page.index('<div class="tablebox"><table id="summary">')
    assert box < page.index("</table></div>", box)
    for s in ("s1", "s2", "s3"):
        assert f'<td><a href="#s-{s}">{s}</a></td>' in page
        section = page.index(f'<div class="sample" id="s-{s}">')
        assert page.index('href="#summary-section">↑ summary</a>', section) < page.index("<h3>", section)
    banner = re.search(r'<div class="note err"><b>2 sample\(s\) failed</b>: (.*?)</div>', page)
    assert banner and '<a href="#s-s2">s2</a>' in banner.group(1) and '<a href="#s-s3">s3</a>' in banner.group(1)
    assert banner.start() < page.index('id="summary-section"')
    assert '<p class="err">error: img.tif: not an image</p>' in page  # the failed section says why
    # beside the answer, what bears on trusting it
    assert "unexplained: 1 of 6 rings" in page and "look-alikes within the window: Ag" in page


def test_linked_figures_keep_a_large_report_small(tmp_path):
    """With figures linked, the page links the PNG files beside it (relative paths, loaded lazily)
    instead of holding them; auto switches to that above 100 samples."""
    from ringid.report.html import INLINE_MAX_SAMPLES

    res = make_results(tmp_path)
    png = b"\x89PNG\r\n\x1a\n" + b"\x00" * 5000
    (res / "samples" / "s1" / "overview.png").write_bytes(png)
    inline = write_report(res, ["s1", "s2", "s3"], ["c1"], figures="inline").read_text()
    assert "data:image/png;base64," in inline and 'loading="lazy"' not in inline
    linked = write_report(res, ["s1", "s2", "s3"], ["c1"], figures="linked").read_text()
    assert '<img alt="overview of s1" loading="lazy" src="samples/s1/overview.png">' in linked
    assert "data:image/png;base64," not in linked and len(linked) < len(inline) - 5000
    assert "keep the folder together" in linked
    few = write_report(res, ["s1", "s2", "s3"], ["c1"]).read_text()  # auto, 3 samples: inline
    many = ["s1", "s2", "s3"] + [f"missing{k}" for k in range(INLINE_MAX_SAMPLES)]  # auto, 103 samples: linked
    assert "data:image/png;base64," in few
    assert 'loading="lazy" src="samples/s1/overview.png"' in write_report(res, many, ["c1"]).read_text()
