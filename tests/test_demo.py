"""The demo runs end to end and verifies with zero disagreements (invented data: demo only)."""

from __future__ import annotations

import duckdb
from click.testing import CliRunner

from tree2sql.cli import cli


def test_demo_verifies_and_scores_every_shipment(tmp_path):
    result = CliRunner().invoke(cli, ["demo", "--rows", "20000", "--workdir", str(tmp_path)])
    assert result.exit_code == 0, result.output
    assert "0 disagreements" in result.output
    assert "Caution" in result.output
    con = duckdb.connect(str(tmp_path / "cold_chain.duckdb"), read_only=True)
    scored, nulls = con.execute(
        "SELECT COUNT(*), COUNT(*) - COUNT(risk_prob_excursion) FROM shipment_risk").fetchone()
    assert scored == 20000
    assert nulls == 0  # the forest takes missing battery readings (routed, not refused)
