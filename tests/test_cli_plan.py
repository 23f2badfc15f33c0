"""Tests for `shoal plan` (gateway/cli/plan.py), in-process through
gateway.cli.main and once through the installed console script."""
from __future__ import annotations

import json
import math
import subprocess
import sys
from fractions import Fraction
from pathlib import Path

import pytest

from gateway.cli import main
from gateway.cli.plan import parse_domains, parse_rate
from gateway.errors import ShoalError
from gateway.planner import PlanError

REPO = Path(__file__).resolve().parent.parent
KEYS = {"overhead", "mttdl_hours", "annual_loss_probability", "tolerated_store_losses", "alternatives"}


def exact_mttdl(n: int, k: int, afr: float, repair_hours: float) -> float:
    """The model of docs/durability.md computed without the planner: the
    birth-death chain's expected absorption time as a sum of first-passage
    times (a standard result for birth-death chains, common practice), in
    exact rationals from the same float rates."""
    lam = Fraction(-math.log1p(-afr) / 8766)
    mu = Fraction(1 / repair_hours)
    total = t = Fraction(0)
    for i in range(n - k + 1):
        t = (1 + (mu if i else 0) * t) / ((n - i) * lam)
        total += t
    return float(total)


def plan_json(capsys, *argv: str) -> dict:
    assert main(["plan", *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_issue_example_json_is_the_exact_model(capsys):
    out = plan_json(capsys, "--k", "4", "--n", "6", "--afr", "0.02", "--repair-hours", "24")
    assert KEYS <= out.keys()
    assert out["overhead"] == 1.5
    assert out["tolerated_store_losses"] == {"read": 2, "write": 1}
    assert out["mttdl_hours"] == exact_mttdl(6, 4, 0.02, 24)
    # 1 - exp(x) written plainly loses digits to cancellation; 1e-6 is its precision here.
    assert math.isclose(out["annual_loss_probability"], 1 - math.exp(-8766 / out["mttdl_hours"]), rel_tol=1e-6)
    names = [a["name"] for a in out["alternatives"]]
    assert names == ["2 full copies", "3 full copies", "single parity (5 of 6)", "double parity (4 of 6)"]
    for alt in out["alternatives"]:
        assert KEYS - {"alternatives"} | {"name"} <= alt.keys()
    single = out["alternatives"][2]
    assert single["mttdl_hours"] == exact_mttdl(6, 5, 0.02, 24)  # same disks, n - 1 of n
    assert single["tolerated_store_losses"] == {"read": 1, "write": 0}
    assert "w" in out["assumptions"]["defaults_used"] and "afr" not in out["assumptions"]["defaults_used"]
    assert out["dominant_risk"] and any("not a backup" in c for c in out["cautions"])


@pytest.mark.parametrize("k,n,afr,hours", [(2, 3, 0.05, 72), (5, 9, 0.02, 12), (10, 14, 0.01, 48), (1, 2, 0.03, 24)])
def test_other_layouts_are_exact_too(capsys, k, n, afr, hours):
    out = plan_json(capsys, "--k", str(k), "--n", str(n), "--afr", str(afr), "--repair-hours", str(hours))
    assert out["mttdl_hours"] == exact_mttdl(n, k, afr, hours)
    assert out["overhead"] == n / k


def test_disk_size_and_rate_derive_repair(capsys):
    out = plan_json(capsys, "--k", "4", "--n", "6", "--disk-size", "8TB", "--repair-rate", "100MB/s")
    # Common-practice arithmetic: 8e12 B / 1e8 B/s = 80 000 s; usable 6 x 8 TB x 4/6 = 32 TB.
    assert math.isclose(out["repair_hours"], 80000 / 3600)
    assert out["usable_bytes"] == 32 * 10**12
    assert out["mttdl_hours"] == exact_mttdl(6, 4, 0.02, 80000 / 3600)
    assert 0 < out["ure_loss_probability_per_critical_rebuild"] < 1
    assert {"afr", "fill", "ure_per_bit"} <= set(out["assumptions"]["defaults_used"])


def test_table_states_defaults_and_cautions(capsys):
    assert main(["plan", "--k", "4", "--n", "6"]) == 0
    text = capsys.readouterr().out
    assert "[default]" in text and "24 h  [default" in text
    assert "Dominant risk:" in text and "not a backup" in text and "model, not a promise" in text
    for name in ("2 full copies", "3 full copies", "single parity (5 of 6)", "double parity (4 of 6)"):
        assert name in text


def write_config(tmp: Path, domains: list[str], k: int, n: int, w: int) -> Path:
    lines = ["[pool]", 'name = "lab"', f"k = {k}", f"n = {n}", f"write_quorum = {w}", f'state_dir = "{tmp / "state"}"', "",
             "[repair]", 'rate = "200MB"', 'grace = "30m"']
    for i, d in enumerate(domains):
        lines += ["", "[[store]]", f'path = "{tmp / f"disk{i}"}"', f'domain = "{d}"']
    p = tmp / "lab.toml"
    p.write_text("\n".join(lines) + "\n")
    return p


def test_config_nine_stores_three_domains(capsys, tmp_path):
    # Common practice: nine stores in three equal domains at k=5, n=9, w=6
    # keep reading and writing with any one domain down.
    cfg = write_config(tmp_path, ["rackA"] * 3 + ["rackB"] * 3 + ["rackC"] * 3, 5, 9, 6)
    out = plan_json(capsys, str(cfg))
    assert out["layout"]["stores"] == 9 and out["layout"]["domains"] == {"rackA": 3, "rackB": 3, "rackC": 3}
    assert out["tolerated_store_losses"] == {"read": 4, "write": 3} and out["overhead"] == 1.8
    assert out["domain_survival"] == {"domains": 3, "read": 1, "write": 1, "complete": True}
    singles = [d for d in out["domain_losses"] if len(d["lost"]) == 1]
    assert all(d["reads_ok"] and d["writes_ok"] for d in singles)
    assert {"afr", "repair_hours"} <= set(out["assumptions"]["defaults_used"])


def test_config_repair_settings_feed_the_rebuild(capsys, tmp_path):
    cfg = write_config(tmp_path, [f"h{i}" for i in range(6)], 4, 6, 5)
    out = plan_json(capsys, str(cfg), "--disk-size", "4TB", "--repair-rate", "1GB/s")
    # The config caps repair at 200 MB/s of regenerated data and waits 30 min first:
    # 0.5 h + 4e12 / 2e8 s.
    assert math.isclose(out["repair_hours"], 0.5 + 4e12 / 2e8 / 3600)


def test_more_stores_than_n_is_reported_as_bound(capsys):
    out = plan_json(capsys, "--k", "4", "--n", "6", "--stores", "12", "--repair-hours", "24", "--domains", "3")
    assert out["model"] == "bound" and out["layout"]["domains"] == {"d1": 4, "d2": 4, "d3": 4}
    assert any("bound" in c for c in out["cautions"])


def test_explain(capsys):
    assert main(["plan", "--explain"]) == 0
    text = capsys.readouterr().out
    assert "-ln(1 - AFR) / 8766" in text and "1 - exp(-8766 h / MTTDL)" in text and "bound" in text
    assert main(["plan", "--k", "2", "--n", "4", "--explain"]) == 0
    text = capsys.readouterr().out
    assert "state 2: fail -> 3 (loss)" in text and "Durability" in text


def test_simulate(capsys):
    out = plan_json(capsys, "--k", "2", "--n", "4", "--afr", "0.999", "--repair-hours", "100", "--simulate", "3000",
                    "--seed", "3")
    sim = out["simulation"]
    assert sim["runs"] == 3000 and sim["confidence"] == 0.99
    lo, hi = sim["mttdl_ci_hours"]
    assert lo <= out["mttdl_hours"] <= hi and sim["exact_inside_interval"]


def test_chart_svg(capsys, tmp_path):
    pytest.importorskip("matplotlib")
    chart = tmp_path / "tradeoff.svg"
    assert main(["plan", "--k", "4", "--n", "6", "--chart", str(chart)]) == 0
    assert "21 layouts drawn" in capsys.readouterr().out  # every k <= n <= 6
    assert "<svg" in chart.read_text()[:2000]


def test_chart_without_matplotlib(capsys, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # import now raises ImportError
    assert main(["plan", "--k", "4", "--n", "6", "--chart", str(tmp_path / "x.png")]) != 0
    assert "pip install 'shoal[plot]'" in capsys.readouterr().err


@pytest.mark.parametrize("argv,msg", [
    (["--k", "7", "--n", "6"], "more than n"),
    (["--k", "4", "--n", "6", "--afr", "1.5"], "strictly between 0 and 1"),
    (["--k", "4", "--n", "6", "--afr", "0"], "strictly between 0 and 1"),
    (["--k", "4", "--n", "6", "--repair-hours", "-3"], "must be positive"),
    (["--k", "4", "--n", "6", "--domains", "a=4,b=1"], "cannot hold n = 6"),
    (["--k", "4", "--n", "6", "--repair-rate", "100MB/s"], "needs --disk-size"),
    (["--k", "4", "--n", "6", "--repair-hours", "5", "--disk-size", "8TB", "--repair-rate", "1GB/s"], "not both"),
    (["--k", "4", "--n", "6", "--disk-size", "lots"], "is not a size"),
    (["--k", "4", "--n", "6", "--domains", "a:3"], "NAME=COUNT"),
    (["--k", "4", "--n", "6", "--chart", "x.pdf"], "png or .svg"),
    (["--k", "4", "--n", "6", "--simulate", "100"], "too rare to sample"),
    (["--n", "6"], "give a pool config"),
    (["lab.toml", "--k", "4"], "not both"),
])
def test_bad_input(capsys, argv, msg):
    assert main(["plan", *argv]) == 1
    err = capsys.readouterr().err
    assert msg in err and err.startswith("shoal: ")


def test_missing_config_is_a_config_error(capsys, tmp_path):
    assert main(["plan", str(tmp_path / "absent.toml")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_parsers():
    # Decimal units as gateway.config.parse_size reads them.
    assert parse_rate("100MB/s") == parse_rate("100MB") == 100e6
    assert parse_rate("1GiB/s") == float(1 << 30)
    with pytest.raises(PlanError):
        parse_rate("fast")
    assert parse_domains("a=2,b=3", None) == {"a": 2, "b": 3}
    assert parse_domains("3", 7) == {"d1": 3, "d2": 2, "d3": 2}
    with pytest.raises(ShoalError):
        parse_domains("3", None)


def test_console_script():
    shoal = REPO / ".venv" / "bin" / "shoal"
    if not shoal.exists():
        pytest.skip(f"{shoal} is not installed: run .venv/bin/pip install -e '.[test]'")
    proc = subprocess.run([str(shoal), "plan", "--k", "4", "--n", "6", "--afr", "0.02", "--repair-hours", "24", "--json"],
                          capture_output=True, text=True, timeout=120, check=False)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert KEYS <= out.keys() and out["mttdl_hours"] == exact_mttdl(6, 4, 0.02, 24)
