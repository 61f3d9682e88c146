"""What a technician sees at the command line when an input is wrong.

End-to-end through :func:`fitting.cli.main` with the shipped demo recipe: every bad
input must give exit status 2 (fit) or a recorded error (batch), one line on stderr
that names the file, the line where there is one and what to do, and no traceback.
No fit runs here (every input fails before the fit), so the file stays fast.
"""

import codecs
import csv
import io
import json
from pathlib import Path

import pytest

from fitting.cli import main

ROOT = Path(__file__).resolve().parents[1]
RECIPE = ROOT / "demo_data" / "recipe.json"
GOOD = ROOT / "demo_data" / "spectra" / "PL2-T-0101.csv"   # "Wavelength (nm),T", 300-1100 nm


def run(argv):
    out, err = io.StringIO(), io.StringIO()
    code = main([str(a) for a in argv], stdout=out, stderr=err)
    return code, out.getvalue(), err.getvalue()


def good_rows() -> list[str]:
    return GOOD.read_text(encoding="utf-8").splitlines()


def recipe_with(tmp_path, name, edit) -> Path:
    d = json.loads(RECIPE.read_text(encoding="utf-8"))
    edit(d)
    p = tmp_path / name
    p.write_text(json.dumps(d), encoding="utf-8")
    return p


def _text_in_number(rows):
    rows[56] = rows[56].split(",")[0] + ",abc"        # line 57 of the file
    return "\n".join(rows) + "\n"


def _one_decimal_comma_column(rows):
    # The T column alone, in percent with a decimal comma: "7,65" per line.
    return "".join(f"{100 * float(r.split(',')[1]):.4f}".replace(".", ",") + "\n"
                   for r in rows[1:])


BROKEN = {
    # name: (bytes, what the message must say, in order)
    "empty.csv": (b"", ["empty.csv, line 1: the file is empty", "export the spectrum again"]),
    "export.csv": (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR" + bytes(64),
                   ["export.csv: this is a PNG image", "export the spectrum as a text table"]),
    "sheet.csv": (b"PK\x03\x04" + bytes(64), ["sheet.csv: this is a ZIP archive",
                                              "save the sheet as CSV"]),
    "onecol.csv": (None, ["onecol.csv, line 2: only one column of numbers",
                          "export both columns"]),
    "comma.csv": (None, ["comma.csv, line 1: only one column of numbers", "found '7,6501'"]),
    "textnum.csv": (None, ["textnum.csv, line 57: column 2 ('T') holds text",
                           "found 'abc'"]),
    "ebcdic.csv": (None, ["ebcdic.csv, line 1: the text is unreadable",
                          "save or export it again as UTF-8"]),
}


def write_broken(folder: Path, name: str) -> Path:
    rows = good_rows()
    content = BROKEN[name][0]
    if name == "onecol.csv":
        content = "\n".join(r.split(",")[0] for r in rows).encode()   # header + wavelengths
    elif name == "comma.csv":
        content = _one_decimal_comma_column(rows).encode()
    elif name == "textnum.csv":
        content = _text_in_number(rows).encode()
    elif name == "ebcdic.csv":
        content = ("\n".join(rows) + "\n").encode("cp500")             # EBCDIC: not tried
    path = folder / name
    folder.mkdir(parents=True, exist_ok=True)
    path.write_bytes(content)
    return path


def assert_one_clear_line(err: str, parts):
    assert "Traceback" not in err and err.count("\n") == 1, err
    assert err.startswith("pellucid: error: "), err
    at = 0
    for part in parts:
        at = err.find(part, at)
        assert at >= 0, f"{part!r} not in {err!r}"


@pytest.mark.parametrize("name", sorted(BROKEN))
def test_fit_of_a_broken_file_says_file_line_and_what_to_do(tmp_path, name, monkeypatch):
    monkeypatch.chdir(tmp_path)          # relative names, as a technician types them
    write_broken(tmp_path, name)
    code, out, err = run(["fit", name, "--recipe", RECIPE, "--out", "res"])
    assert code == 2 and out == ""
    assert_one_clear_line(err, BROKEN[name][1])
    assert not any((tmp_path / "res").glob("*")), "nothing is exported for a bad file"


def test_reflectance_file_given_to_a_transmittance_recipe(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    rows = good_rows()
    rows[0] = "Wavelength (nm),R (%)"
    Path("refl.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    recipe = recipe_with(tmp_path, "t.json", lambda d: d["reader"].update(y_kind="T_percent"))
    code, _, err = run(["fit", "refl.csv", "--recipe", recipe, "--out", "res"])
    assert code == 2
    assert_one_clear_line(err, ["refl.csv, line 1: column 2 ('R (%)') holds reflectance R",
                                "reader is set to read transmittance T",
                                "use a transmittance T file, or set y_kind='auto'"])


def test_utf32_export_is_read_not_refused(tmp_path):
    # Read and handed on: a fit range beside the data (300-1100 nm) stops the run right
    # after reading, so no fit time is spent, and the error is about the range, not the
    # encoding.
    path = tmp_path / "u32.csv"
    path.write_bytes(codecs.BOM_UTF32_LE + ("\n".join(good_rows()) + "\n").encode("utf-32-le"))
    recipe = recipe_with(tmp_path, "uv.json", lambda d: d["fit"].update(range_nm=[100.0, 250.0]))
    code, _, err = run(["fit", path, "--recipe", recipe, "--out", tmp_path / "res"])
    assert code == 2 and "encoding" not in err and "binary" not in err
    assert "u32" in err and "fit range" in err


def test_spectrum_outside_the_substrate_range(tmp_path):
    path = tmp_path / "ir.csv"
    path.write_text("Wavelength (nm),T\n" + "".join(f"{w},0.9\n" for w in range(4000, 6001, 5)),
                    encoding="utf-8")
    recipe = recipe_with(tmp_path, "all.json", lambda d: d["fit"].update(range_nm=None))
    code, _, err = run(["fit", path, "--recipe", recipe, "--out", tmp_path / "res"])
    assert code == 2
    assert_one_clear_line(err, ["ir", "fused silica is valid from 210 to 3710 nm",
                                "4000-6000 nm", "restrict the fit range"])


@pytest.mark.parametrize("edit, parts", [
    (lambda d: d["fit"].update(rang_nm=d["fit"].pop("range_nm")),
     ["bad.json", "field 'fit.rang_nm'", "unknown field"]),
    (lambda d: d.update(version=7),
     ["bad.json", "field 'version'", "newer than this Pellucid understands", "update Pellucid"]),
])
def test_recipe_mistakes_name_the_field(tmp_path, edit, parts):
    recipe = recipe_with(tmp_path, "bad.json", edit)
    for cmd in (["fit", GOOD], ["batch", GOOD]):
        code, _, err = run([*cmd, "--recipe", recipe, "--out", tmp_path / "res"])
        assert code == 2
        assert_one_clear_line(err, parts)


def test_batch_of_broken_files_records_each_reason_and_goes_on(tmp_path):
    folder = tmp_path / "in"
    for name in BROKEN:
        write_broken(folder, name)
    code, out, err = run(["batch", folder, "--recipe", RECIPE, "--out", tmp_path / "o",
                          "--jobs", "1", "--no-report"])
    assert code == 2 and f"0 ok, 0 failed, {len(BROKEN)} errors" in out
    assert "Traceback" not in err
    with open(tmp_path / "o" / "summary.csv", newline="", encoding="utf-8") as fh:
        rows = {Path(r["file"]).name: r for r in csv.DictReader(fh)}
    assert set(rows) == set(BROKEN)
    for name, (_, parts) in BROKEN.items():
        assert rows[name]["status"] == "error"
        # The row keeps the reader's whole message: line and advice included.
        tail = parts[0].split(name, 1)[1].lstrip(",: ")
        assert tail in rows[name]["reason"] and parts[-1] in rows[name]["reason"]
        assert any(name in line and parts[-1] in line for line in err.splitlines())


def test_fit_refuses_a_folder_and_an_out_that_is_a_file(tmp_path):
    import io
    from fitting import cli
    folder = tmp_path / "spectra"
    folder.mkdir()
    err = io.StringIO()
    code = cli.main(["fit", str(folder), "--recipe", str(_demo_recipe()), "--out",
                     str(tmp_path / "o")], stdout=io.StringIO(), stderr=err)
    assert code == 2 and "is a folder" in err.getvalue() and "pellucid batch" in err.getvalue()
    spec = next((_demo_root() / "spectra").iterdir())
    blocker = tmp_path / "out.txt"
    blocker.write_text("x", encoding="utf-8")
    err = io.StringIO()
    code = cli.main(["fit", str(spec), "--recipe", str(_demo_recipe()), "--out", str(blocker)],
                    stdout=io.StringIO(), stderr=err)
    assert code == 2 and "is a file" in err.getvalue()


def _demo_root():
    import pathlib
    return pathlib.Path(__file__).resolve().parents[1] / "demo_data"


def _demo_recipe():
    return _demo_root() / "recipe.json"
