"""The pages' parts without a browser: wording of the envelope verdict, the try-a-row path
against the predict route's own validation, damaged stores, the report route's refusals,
the row counts behind the overview, and the package data that carries the templates."""

from __future__ import annotations

import fnmatch
import os
from pathlib import Path

import orjson
import pytest

from service.answers import parse_body
from service.app import create_app
from service.errors import ApiError
from service.metrics import counted_since, row_counts
from service.page_row import ordinal, verdict
from service.settings import Settings
from trainer.job import TrainOptions, train

ROOT = Path(__file__).resolve().parents[1]
FEATURES = ["oven_temp_c", "line_speed_m_min", "wet_film_um", "humidity_pct", "viscosity_mpas"]


@pytest.fixture
def client(store_dir, small_csv):
    """coating v1 (released) and v2 (not released) from 60 demo rows; a test client."""
    for release in (True, False):
        train(TrainOptions(data=str(small_csv), targets=["hardness_s", "gloss_gu"],
                           name="coating", features=FEATURES, kernel="rbf", gamma=0.2,
                           ridge=0.1, store=str(store_dir), quiet=True, report=False,
                           release=release), log=lambda *a, **k: None)
    app = create_app(Settings(store=str(store_dir)), watch=False)
    c = app.test_client()
    c.store = store_dir
    return c


def row_query(**values) -> str:
    row = {"oven_temp_c": 190, "line_speed_m_min": 20, "wet_film_um": 60, "humidity_pct": 50,
           "viscosity_mpas": 600, **values}
    return "&".join(f"f{j}={row[f]}" for j, f in enumerate(FEATURES))


def test_verdict_names_feature_side_and_distance():
    env = {"inside": False, "novelty": 0.62, "novel": False,
           "out_of_range": {"humidity_pct": {"value": 12.0, "min": 20.0, "max": 85.0}}}
    lines = verdict(env, 5)
    assert lines[0] == ("Out of range: <bdi>humidity_pct</bdi> = 12 is below its training "
                        "range 20 to 85 by 8.")
    assert lines[1].startswith("Not novel: novelty 0.62")
    novel = verdict({"inside": False, "novelty": 1.5, "novel": True, "out_of_range": {}}, 5)
    assert novel[0].startswith("Novel row: novelty 1.5. Its 5th nearest training row")
    inside = verdict({"inside": True, "novelty": 0.3, "novel": False, "out_of_range": {}}, 5)
    assert inside[0].startswith("Inside the training envelope")
    assert [ordinal(n) for n in (1, 2, 3, 4, 11, 12, 13, 21, 22, 101, 111)] == [
        "1st", "2nd", "3rd", "4th", "11th", "12th", "13th", "21st", "22nd", "101st", "111th"]


def test_try_a_row_refuses_what_the_predict_route_refuses(client):
    # nan and an over-large value pass float() but not the route's validation: the page
    # shows the route's own message for the same row sent as JSON
    for bad in ("nan", "1e13"):
        page = client.get(f"/page/coating/try?{row_query(wet_film_um=bad)}").get_data(True)
        row = dict(zip(FEATURES, [190.0, 20.0, float(bad), 50.0, 600.0], strict=True))
        with pytest.raises(ApiError) as err:
            parse_body(orjson.dumps({"rows": [row], "coverage": 0.9}), 100, FEATURES)
        assert "wet_film_um" in err.value.message
        assert f"The row was refused: {err.value.message}".replace("'", "&#39;") in page
    page = client.get(f"/page/coating/try?{row_query(wet_film_um='6,5')}").get_data(True)
    assert "enter a number (a decimal point, not a comma)" in page
    page = client.get(f"/page/coating/try?{row_query()}&coverage=lots").get_data(True)
    assert "enter a number between 0 and 1" in page and "Result" not in page
    page = client.get(f"/page/coating/try?{row_query()}&coverage=").get_data(True)
    assert "Inside the training envelope" in page and "interval:" not in page


def test_try_a_pinned_version_and_the_live_one(client):
    live = client.get(f"/page/coating/try?{row_query()}").get_data(True)
    assert "coating v1 <span class=\"live\">live</span>" in live
    pinned = client.get(f"/page/coating/try?version=2&{row_query()}").get_data(True)
    assert "coating v2</h1>" in pinned and 'name="version" value="2"' in pinned
    assert client.get("/page/coating/try?version=0").status_code == 404


def test_model_without_live_version_and_damaged_parts(client):
    store = client.store
    with open(store / "coating" / "history.jsonl", "a") as fh:
        fh.write("{not json\n")
    page = client.get("/page/coating").get_data(True)
    assert "history line(s) 2 cannot be read and are left out" in page
    assert "released <strong>v1</strong>" in page
    (store / "coating" / "versions" / "2" / "manifest.json").write_text("{")
    page = client.get("/page/coating").get_data(True)
    assert "coating v2: manifest.json is not valid JSON" in page
    (store / "coating" / "live.json").write_text("[]")
    overview = client.get("/").get_data(True)
    assert "live.json is damaged" in overview
    os.unlink(store / "coating" / "live.json")
    overview = client.get("/").get_data(True)
    assert "nothing released yet" in overview
    fresh = create_app(Settings(store=str(store)), watch=False).test_client()
    r = fresh.get("/page/coating/try")  # a service started now has nothing to serve
    assert r.status_code == 404 and "nothing to serve" in r.get_data(True)
    for url in ("/", "/page/coating", "/page/coating/try"):
        assert str(store) not in client.get(url).get_data(True)


def test_report_route_serves_only_the_versions_own_report(client, tmp_path):
    vdir = client.store / "coating" / "versions"
    (vdir / "1" / "report.html").write_text("<!DOCTYPE html><title>r1</title>")
    r = client.get("/models/coating/versions/1/report")
    assert r.status_code == 200 and r.get_data(True).endswith("<title>r1</title>")
    assert "default-src 'none'" in r.headers["Content-Security-Policy"]
    missing = client.get("/models/coating/versions/2/report")
    assert missing.status_code == 404 and "has no training report" in missing.json["error"][
        "message"]
    secret = tmp_path / "elsewhere.html"
    secret.write_text("not the store's")
    (vdir / "2" / "report.html").symlink_to(secret)
    r = client.get("/models/coating/versions/2/report")
    assert r.status_code == 404 and "not the store's" not in r.get_data(True)
    assert str(tmp_path) not in r.get_data(True)


def test_row_counts_follow_predictions(client, monkeypatch):
    # this process counts in its own registry (importing the gunicorn config elsewhere in the
    # suite sets a multiprocess directory that this process never wrote to)
    monkeypatch.delenv("PROMETHEUS_MULTIPROC_DIR", raising=False)
    before = row_counts().get("coating")
    rows = [dict(zip(FEATURES, [190, 20, 60, 50, 600], strict=True)),
            dict(zip(FEATURES, [400, 20, 60, 50, 600], strict=True))]
    assert client.post("/models/coating/predict", json={"rows": rows}).status_code == 200
    after = row_counts()["coating"]
    base = before or type(after)(0.0, 0.0, 0.0)
    assert after.rows - base.rows == 2
    assert after.out_of_range - base.out_of_range == 1
    assert after.novel - base.novel >= 1  # 400 °C is far from every training row
    client.get(f"/page/coating/try?{row_query(oven_temp_c=400)}")
    assert row_counts()["coating"] == after  # trying a row on the page is not traffic
    assert counted_since().endswith("+00:00")


def test_templates_and_stylesheet_are_package_data():
    tomllib = pytest.importorskip("tomllib")  # Python ≥ 3.11
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())
    globs = config["tool"]["setuptools"]["package-data"]["service"]
    service = ROOT / "service"
    files = [p.relative_to(service).as_posix()
             for folder in ("templates", "static") for p in (service / folder).rglob("*")
             if p.is_file()]
    assert files
    for f in files:
        assert any(fnmatch.fnmatch(f, g) for g in globs), f
