"""Close the loop (issue 12): readings posted to the service, alerts closed with outcomes,
`kilter export` -> `kilter train` -> validated reload -> `kilter evaluate`, all on real parts
(SQLite or PostgreSQL, ONNX Runtime, torch for the small retrained model)."""

from __future__ import annotations

import contextlib
import csv
import io
import json
import shutil
from pathlib import Path
from typing import Any

import pytest

pytest.importorskip("torch")

from service.cli import main  # noqa: E402
from service.replay import read_file, replay  # noqa: E402
from service_env import BUNDLED_ID, bundled_model_dir, start_env  # noqa: E402
from training import demo_data  # noqa: E402

DAYS = 5
TOLERANCE_S = 3600.0
TRAIN = [
    "--epochs", "2", "--epoch-windows", "400", "--hidden", "8", "--latent", "3", "--layers", "1",
    "--decoder-layers", "1", "--threads", "1", "--version", "2",
]  # fmt: skip


def _outcome(asset: str, start_s: float, end_s: float, events: list[demo_data.DemoEvent]) -> str:
    """What a maintainer would close the alert as, knowing the invented fleet's true events."""
    hits = [e for e in events if e.asset == asset and e.start_s <= end_s and e.end_s + TOLERANCE_S >= start_s]
    if any(e.kind != "maintenance" for e in hits):
        return "confirmed_fault"
    return "planned_work" if hits else "false_alarm"


def _seconds(value: Any) -> float:
    """A stored time as epoch seconds, whichever way the database hands it back."""
    from datetime import datetime, timezone

    from service.grid import parse_timestamp

    if isinstance(value, datetime):
        return (value if value.tzinfo else value.replace(tzinfo=timezone.utc)).timestamp()
    return parse_timestamp(str(value), default_tz="UTC")


def _run(argv: list[str]) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def test_export_train_reload_evaluate(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    models = tmp_path / "models"
    shutil.copytree(bundled_model_dir() / BUNDLED_ID, models / BUNDLED_ID)
    demo = demo_data.generate(assets=2, days=DAYS, seed=7, start=demo_data.DEMO_DAY_START_S)
    readings_in, _ = demo_data.write(demo, tmp_path / "demo")
    gen = start_env(tmp_path, models)
    env: Any = next(gen)
    try:
        channels, series = read_file(readings_in)
        posted = replay(url="http://testserver", key=env.keys["machine"], channels=channels, series=series, batch=120, progress=False, client=env.client)
        assert posted.accepted == demo.n_rows and posted.alerts_opened > 0
        # Close every alert as a maintainer would; one stays open (unreviewed).
        alerts = env.rows("SELECT id, asset_id, opened_at, last_seen_at FROM alerts ORDER BY id")
        outcomes: dict[int, str] = {}
        for alert_id, asset, opened, last in alerts[:-1]:
            t0, t1 = (_seconds(v) for v in (opened, last))
            outcomes[alert_id] = _outcome(asset, t0, t1, demo.events)
            r = env.client.post(f"/v1/alerts/{alert_id}/close", json={"outcome": outcomes[alert_id], "note": "checked on site"}, headers=env.auth("maintenance"))
            assert r.status_code == 200, r.text

        monkeypatch.setenv("KILTER_DATABASE_URL", env.settings.database_url)
        monkeypatch.setenv("KILTER_MODEL_DIR", str(models))
        monkeypatch.chdir(tmp_path)  # no stray .env
        out = tmp_path / "export"
        # Train on the first four days, evaluate on the day after (a second export).
        code, stdout, stderr = _run(["export", "--out", str(out), "--since", "2026-10-13", "--until", "2026-10-17"])
        assert code == 0, stderr
        assert stdout.strip() == str(out) and "--units flow_m3h=m3/h" in stderr

        # The readings come back as stored, in the trainer's wide layout.
        with open(out / "readings.csv", newline="") as f:
            rows = list(csv.reader(f))
        cut = demo_data.DEMO_DAY_START_S + 4 * 86400
        assert rows[0] == ["timestamp", "asset", *demo_data.CHANNELS]
        assert len(rows) - 1 == sum(int((s.times_s < cut).sum()) for s in series.values())
        with open(out / "events.csv", newline="") as f:
            events = list(csv.DictReader(f))
        want = {"confirmed_fault": "confirmed_fault", "planned_work": "maintenance"}
        kept = {a for a, (_, asset, opened, _l) in zip(outcomes, alerts, strict=False) if _seconds(opened) < cut}
        last_open = _seconds(alerts[-1][2]) < cut
        expected = sorted([want[o] for a, o in outcomes.items() if o in want and a in kept] + (["unreviewed"] if last_open else []))
        assert sorted(e["kind"] for e in events) == expected  # false alarms are no event: they stay normal
        assert all(e["note"].startswith("alert #") for e in events)
        assert "confirmed_fault" in expected
        again = _run(["export", "--out", str(out)])
        assert again[0] == 2 and "exists already" in again[2]

        code, stdout, stderr = _run(["train", "--data", str(out / "readings.csv"), "--exclude", str(out / "events.csv"), "--out", str(models), *TRAIN])
        assert code == 0, stderr
        folder = Path(stdout.strip())
        assert folder == models / BUNDLED_ID / "2"

        r = env.client.post("/v1/models/reload", headers=env.auth("admin"))
        assert r.status_code == 200, r.text
        served = {m["model_id"]: m["version"] for m in env.client.get("/v1/models", headers=env.auth("admin")).json()["items"]}
        assert served == {BUNDLED_ID: "2"}

        later = tmp_path / "export-later"
        code, _, stderr = _run(["export", "--out", str(later), "--since", "2026-10-17"])
        assert code == 0, stderr
        result = tmp_path / "eval.json"
        code, stdout, stderr = _run([
            "evaluate", "--model", str(folder), "--data", str(later / "readings.csv"), "--events", str(later / "events.csv"),
            "--ignore-kinds", "maintenance,unreviewed", "--json", str(result),
        ])  # fmt: skip
        assert code == 0, stderr
        figures = json.loads(result.read_text())["model"]
        assert 0.0 <= figures["roc_auc"] <= 1.0
    finally:
        gen.close()


def test_export_refuses_unknown_assets_and_an_empty_database(tmp_path: Path, tiny_dir: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("KILTER_DATABASE_URL", f"sqlite:///{tmp_path / 'x.db'}")
    monkeypatch.setenv("KILTER_MODEL_DIR", str(tiny_dir))
    monkeypatch.chdir(tmp_path)
    code, _, err = _run(["export", "--out", str(tmp_path / "e")])
    assert code == 2 and "holds no readings yet" in err
    code, _, err = _run(["export", "--out", str(tmp_path / "e"), "--asset", "pump-09"])
    assert code == 2 and "pump-09" in err
    code, _, err = _run(["export", "--out", str(tmp_path / "e"), "--since", "yesterday"])
    assert code == 2 and "--since" in err
    assert not (tmp_path / "e").exists() or not any((tmp_path / "e").iterdir())
