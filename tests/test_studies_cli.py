"""`ivdossier study ...` and `ivdossier audit`: happy paths, exact errors and exit codes, JSON and documents."""

from __future__ import annotations

import json
from pathlib import Path

FIXTURES = Path(__file__).parent / "fixtures" / "bibtex"


def _setup(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("init")[0] == 0
    assert cli("program", "add", "tele", "--title", "Telehealth and emergency visits")[0] == 0
    code, _, err = cli("instrument", "add", "fibre", "--program", "tele", "--name", "Fibre wave",
                       "--family", "distance-geography", "--column", "fibre_months")  # fmt: skip
    assert code == 0, err
    code, out, err = cli("study", "import-bibtex", str(FIXTURES / "varied.bib"))
    assert code == 0, err
    assert out.strip() == "imported 4 studies: Nakamura2019, Okafor2021, Doe2023, Garcia2024"


def test_import_report_attach_critique_and_show(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, err = cli("study", "report", "Nakamura2019", "--estimate", "-0.40", "--std-error", "0.12",
                         "--first-stage-f", "11", "--f-kind", "cluster", "--clusters", "60",
                         "--fs-coef", "0.30", "--fs-se", "0.09", "--rf-coef", "-0.12", "--rf-se", "0.04")  # fmt: skip
    assert code == 0, err
    assert out.strip().startswith("study Nakamura2019 now reports: estimate, f_kind, first_stage_coef")
    assert cli("study", "attach", "Nakamura2019", "--instrument", "fibre")[0] == 0
    assert cli("study", "attach", "Garcia2024", "--family", "distance-geography")[0] == 0
    code, out, err = cli("study", "critique", "Nakamura2019", "--threat", "DG-E01", "--by", "Garcia2024",
                         "--note", "Roads built with the fibre.")  # fmt: skip
    assert (code, out.strip()) == (0, "threat DG-E01 recorded against Nakamura2019 (raised by Garcia2024)"), (
        err
    )
    code, out, _ = cli("study", "show", "Nakamura2019", "--json")
    shown = json.loads(out)
    assert shown["reported"]["n_clusters"] == 60
    assert shown["critiques"][0]["raised_by"] == "Garcia2024"
    code, out, _ = cli("study", "list", "--instrument", "fibre")
    lines = out.splitlines()
    assert lines[0].split() == ["KEY", "CITATION", "TITLE", "ESTIMATE", "F", "ATTACHED", "CRITIQUES"]
    assert [ln.split()[0] for ln in lines[2:]] == ["Garcia2024", "Nakamura2019"]


def test_malformed_bibtex_is_one_line_error_and_nothing_is_imported(cli) -> None:  # type: ignore[no-untyped-def]
    assert cli("init")[0] == 0
    code, out, err = cli("study", "import-bibtex", str(FIXTURES / "malformed_unclosed.bib"))
    assert code == 2
    assert err.strip() == (
        "error: BibTeX line 7: the @article entry that starts here never closes (an opening brace or "
        "parenthesis is not matched); balance its braces."
    )
    code, out, _ = cli("study", "list", "--json")
    assert json.loads(out) == []


def test_bad_options_name_the_field(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, _, err = cli("study", "report", "Okafor2021", "--f-kind", "hc3")
    assert code == 2
    assert "f_kind 'hc3' is not known; use one of homoskedastic, heteroskedastic, clustered" in err
    code, _, err = cli("study", "report", "Okafr2021", "--estimate", "1")
    assert code == 3 and "Did you mean 'Okafor2021'?" in err
    code, _, err = cli("study", "critique", "Okafor2021", "--threat", "DG-E99")
    assert code == 3 and "no threat named 'DG-E99'" in err
    code, _, err = cli("audit", "--out", "audit.pdf")
    assert code == 2 and "must end in .md or .html" in err


def test_csv_import_and_export_bibtex(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    csv_path = tmp_path / "stats.csv"
    csv_path.write_text("key,estimate,std_error,first_stage_f,f_kind,family\n"
                        "Okafor2021,0.5,0.2,9,robust,decision-maker-assignment\n"
                        "Garcia2024,0.3,0.05,150,effective,\n", encoding="utf-8")  # fmt: skip
    code, out, err = cli("study", "import-stats", str(csv_path))
    assert (code, out.strip()) == (0, "recorded statistics for 2 studies"), err
    bib = tmp_path / "out.bib"
    code, out, _ = cli("study", "export-bibtex", str(bib))
    assert code == 0 and out.strip() == f"wrote 4 entries to {bib}"
    assert bib.read_text("utf-8").startswith(
        "@misc{Doe2023,\n  title = {A note without authors, year or venue}\n}"
    )


def test_audit_json_and_documents(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    # t = 3.4 with F = 10: significant with 1.96 but not with the tF value 3.43 (Lee et al. 2022, abstract)
    assert (
        cli(
            "study",
            "report",
            "Nakamura2019",
            "--estimate",
            "3.4",
            "--std-error",
            "1",
            "--first-stage-f",
            "10",
        )[0]
        == 0
    )
    assert (
        cli("study", "report", "Garcia2024", "--estimate", "5", "--std-error", "1", "--first-stage-f", "200")[
            0
        ]
        == 0
    )
    for key in ("Nakamura2019", "Garcia2024"):
        assert cli("study", "attach", key, "--instrument", "fibre")[0] == 0
    assert cli("study", "critique", "Nakamura2019", "--threat", "DG-E01")[0] == 0
    code, out, err = cli("audit", "--instrument", "fibre", "--json")
    assert code == 0, err
    data = json.loads(out)
    assert data["scope"] == "instrument fibre"
    assert {s["key"]: s["verdict_5pct"] for s in data["studies"]} == {
        "Garcia2024": "survives",
        "Nakamura2019": "lost",
    }
    assert data["top_threats"][0]["code"] == "DG-E01"
    assert any("cannot establish exclusion or exogeneity" in c for c in data["cautions"])
    md, html = tmp_path / "audit.md", tmp_path / "audit.html"
    assert cli("audit", "--instrument", "fibre", "--out", str(md))[0] == 0
    text = md.read_text("utf-8")
    assert text.startswith("# Literature audit: instrument fibre\n")
    assert "Statistics cannot establish exclusion or exogeneity." in text
    assert "need domain review" in text
    code, out, _ = cli("audit", "--study", "Nakamura2019", "--out", str(html))
    assert code == 0 and out.splitlines()[0] == "audit of study Nakamura2019: 1 studies, 1 with statistics"
    assert "<script" not in html.read_text("utf-8")


def test_the_standard_error_has_one_name_and_the_old_option_still_works_for_one_release(cli) -> None:  # type: ignore[no-untyped-def]
    _setup(cli)
    code, out, err = cli(
        "study", "report", "Nakamura2019", "--estimate", "-0.4", "--std-error", "0.12", "--json"
    )
    assert code == 0 and err == "" and json.loads(out)["std_error"] == 0.12
    code, out, err = cli("study", "report", "Okafor2021", "--estimate", "0.2", "--se", "0.05", "--json")
    assert code == 0 and json.loads(out)["std_error"] == 0.05
    assert err == "warning: --se is deprecated and will be removed in the next release; use --std-error.\n"
    code, _, err = cli("study", "report", "Doe2023", "--std-error", "1", "--se", "2")
    assert code == 2 and err == "error: give --std-error only; --se is its deprecated old spelling.\n"
    code, _, err = cli("study", "report", "Doe2023", "--std-error", "-1")
    assert code == 2 and "std_error must be positive, got -1.0" in err
    _, help_text, _ = cli("study", "report", "--help")
    assert "--std-error" in help_text and "--se " not in help_text
