"""potfield batch on a LocalCluster with two workers: each survey's failure is reported without
stopping the others (no timing is asserted)."""

from __future__ import annotations

from potfield.batch import run_batch_rows
from potfield.cli import main
from potfield.synthetic import write_synthetic_survey


def test_batch_reports_failure_and_processes_others(tmp_path, capsys):
    good = []
    for k in range(2):
        root = tmp_path / f"good{k}"
        assert main(["new", str(root), "--kind", "magnetic"]) == 0
        write_synthetic_survey(root, readings=3000, seed=k)
        text = (root / "survey.toml").read_text()  # one depth and damping: keep the test quick
        text = text.replace("[grid]\n", "[grid]\ntrial_depths = [4.5]\ntrial_dampings = [0.01]\n", 1)
        (root / "survey.toml").write_text(text)
        good.append(root)
    bad = tmp_path / "bad"
    assert main(["new", str(bad), "--kind", "magnetic"]) == 0  # raw/ left empty on purpose
    rows = run_batch_rows([good[0], bad, good[1]], workers=2)
    by_name = {r["survey"].rsplit("/", 1)[-1]: r for r in rows}
    assert by_name["bad"]["status"] == "error"
    assert "no file matches" in by_name["bad"]["message"]
    for k in range(2):
        assert by_name[f"good{k}"]["status"] == "ok", by_name[f"good{k}"]["message"]
        assert by_name[f"good{k}"]["readings"] > 2000
        assert (good[k] / "out" / "tables" / "readings.csv").is_file()
