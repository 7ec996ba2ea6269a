"""The venue plan: the file format, its import (CLI and API), and the plan view."""

from __future__ import annotations

import asyncio
import copy
import io
import json

import pytest
import yaml

from listenpost.cli import main
from listenpost.collector.models.plan import PLAN_FILE, load_plan, parse_plan
from listenpost.core.errors import ConfigError
from listenpost.core.logs import configure
from tests.collector.test_health_page import build_fleet

REF = "ibeacon:0321413f-8676-4b05-99ca-d259a1f94031:9:1"
PLAN = {
    "title": "Test venue",
    "floors": [
        {
            "id": "ground",
            "title": "Ground floor",
            "rooms": [
                {"id": "G0", "name": "G0 Foyer", "polygon": [[0, 0], [10, 0], [10, 8], [0, 8]]},
                {"id": "G2", "name": "G2 Sound Lab", "polygon": [[10, 0], [20, 0], [20, 8], [10, 8]]},
                {"id": "G3", "name": "G3 Weather Hall", "polygon": [[0, 8], [20, 8], [20, 16], [0, 16]]},
            ],
        },
        {
            "id": "upper",
            "title": "Upper floor",
            "level_m": 4.5,
            "rooms": [
                {"id": "U2", "name": "U2 Body Works", "polygon": [[0, 0], [10, 0], [10, 8], [0, 8]]},
                {"id": "U3", "name": "U3 Machines", "polygon": [[10, 0], [20, 0], [15, 8]]},
                {"id": "U5", "name": "U5 Workshop", "polygon": [[0, 8], [20, 8], [20, 16], [0, 16]]},
            ],
        },
    ],
    "boards": [
        {"name": "g0-a", "floor": "ground", "position": [2, 2], "height_m": 2.5},
        {"name": "g2-a", "floor": "ground", "position": [15, 4]},
        {"name": "g3-b", "floor": "ground", "position": [10, 12]},
        {"name": "u2-a", "floor": "upper", "position": [5, 4]},
        {"name": "u3-a", "floor": "upper", "position": [15, 2]},
        {"name": "u5-a", "floor": "upper", "position": [10, 12]},
    ],
    "reference_tags": [
        {"id": REF.upper().replace("IBEACON", "ibeacon"), "floor": "ground", "position": [5, 5]}
    ],
}


def test_a_plan_reads_and_round_trips():
    plan = parse_plan(PLAN)
    assert [f.id for f in plan.floors] == ["ground", "upper"]
    assert plan.room_at("ground", 15, 4).name == "G2 Sound Lab" and plan.room_at("upper", 19, 7) is None
    assert plan.reference_tags[0].id == REF  # canonical form
    assert parse_plan(json.loads(json.dumps(plan.to_document()))) == plan


def _with(path: str, value):
    doc = copy.deepcopy(PLAN)
    *head, last = path.split(".")
    node = doc
    for k in head:
        node = node[int(k)] if k.isdigit() else node[k]
    if value is KeyError:
        del node[last if not last.isdigit() else int(last)]
    else:
        node[int(last) if last.isdigit() else last] = value
    return doc


@pytest.mark.parametrize(
    ("path", "value", "message"),
    [
        (
            "floors.0.rooms.1.polygon",
            [[0, 0], [1, 1]],
            "floors[0].rooms[1].polygon: needs at least 3 corners",
        ),
        ("floors.0.rooms.1.polygon.2", [1, "x"], "floors[0].rooms[1].polygon[2]: must be [x, y] in metres"),
        (
            "floors.1.rooms.1.polygon",
            [[0, 0], [1, 1], [2, 2]],
            "floors[1].rooms[1].polygon: encloses no area",
        ),
        ("floors.1.rooms.0.id", "G0", "floors[1].rooms[0].id: room 'G0' appears twice"),
        ("boards.3.floor", "attic", "boards[3].floor: must be one of the plan's floors"),
        ("boards.1.position", [1], "boards[1].position: must be [x, y] in metres"),
        ("boards.0.name", "G0 A", "boards[0].name: must be a board name"),
        ("boards.0.colour", "red", "boards[0].colour: unknown key"),
        ("reference_tags.0.id", "ibeacon:nope", "reference_tags[0].id:"),
        ("floors", [], "floors: needs at least one floor"),
        ("version", 2, "version: this collector reads version 1"),
    ],
)
def test_errors_name_the_key_path(path, value, message):
    with pytest.raises(ConfigError) as e:
        parse_plan(_with(path, value), "venue.yaml")
    assert str(e.value).startswith(f"venue.yaml: {message}"), str(e.value)


def test_the_demo_venue_plan_is_valid():
    """The demo imports its venue's plan generated from the simulator's truth and scenario."""
    from listenpost.demo import REPLAY_DIR
    from listenpost.demo.collector import venue_plan
    from listenpost.sim.truth import read_truth

    truth = read_truth(REPLAY_DIR)
    plan = parse_plan(venue_plan(truth))
    assert len(plan.boards) == len(truth.boards) == 16 and len(plan.reference_tags) == 4
    for b in truth.boards:  # every board hangs inside the room the truth puts it in
        placed = next(p for p in plan.boards if p.id == b.name)
        assert plan.room_at(placed.floor, placed.x, placed.y).name == b.room_label


async def test_plan_import_from_the_cli_checks_and_keeps_the_plan(aiohttp_client, tmp_path, clock, capsys):
    configure("json", stream=io.StringIO())
    client, _ = await build_fleet(aiohttp_client, tmp_path, clock)
    url = str(client.make_url("")).rstrip("/")
    bad = tmp_path / "bad.yaml"
    bad.write_text(yaml.safe_dump(_with("boards.3.position", [1, 2, 3])))
    rc = await asyncio.to_thread(
        main, ["collector", "plan", "import", str(bad), "--collector", url, "--state-dir", str(tmp_path)]
    )
    err = capsys.readouterr().err
    assert (
        rc == 2 and f"{bad}: boards[3].position: must be [x, y] in metres" in err and "Traceback" not in err
    )
    assert not (tmp_path / PLAN_FILE).exists()  # nothing kept
    good = tmp_path / "venue.yaml"
    good.write_text(yaml.safe_dump(PLAN))
    rc = await asyncio.to_thread(
        main, ["collector", "plan", "import", str(good), "--collector", url, "--state-dir", str(tmp_path)]
    )
    out = capsys.readouterr().out
    assert rc == 0 and "plan imported: 2 floors, 6 rooms, 6 boards, 1 reference tags" in out
    assert load_plan(good) == parse_plan(json.loads((tmp_path / PLAN_FILE).read_text()))


async def test_the_api_refuses_a_bad_plan_naming_the_field(aiohttp_client, tmp_path, clock):
    client, _ = await build_fleet(aiohttp_client, tmp_path, clock)
    auth = {"Authorization": "Bearer " + (tmp_path / "admin-token").read_text().strip()}
    r = await client.put("/v1/admin/plan", json=_with("floors.0.rooms.2.polygon", "square"), headers=auth)
    assert r.status == 400
    err = (await r.json())["error"]
    assert err["field"] == "floors[0].rooms[2].polygon" and "must be list" in err["message"]
    assert (await client.put("/v1/admin/plan", json=PLAN)).status == 401
    assert not (tmp_path / PLAN_FILE).exists()


async def test_the_plan_view_draws_boards_by_state_and_rooms_by_live_coverage(
    aiohttp_client, tmp_path, clock
):
    client, _ = await build_fleet(aiohttp_client, tmp_path, clock)
    html = await (await client.get("/plan")).text()
    assert "No venue plan has been imported yet" in html and "collector plan import FILE" in html
    auth = {"Authorization": "Bearer " + (tmp_path / "admin-token").read_text().strip()}
    assert (await client.put("/v1/admin/plan", json=PLAN, headers=auth)).status == 200
    html = await (await client.get("/plan")).text()
    assert html.count('role="group" aria-labelledby="fl-') == 2  # one drawing per floor
    # The state by shape and word as well as colour.
    assert '<g transform="translate(17.0 16.0)" data-board="u3-a" data-state="silent"' in html
    assert 'data-board="u3-a" data-state="silent" fill="#b02a20"' in html and "<rect x=" in html
    assert "u3-a silent</text>" in html and "g2-a deaf</text>" in html and "u2-a drifting</text>" in html
    # Only g0-a is live: its room is covered once, the others not at all (hatched).
    assert 'data-room="G0" data-live="1"' in html and 'data-room="G2" data-live="0"' in html
    assert "<li><b>G0 Foyer</b>: 1 live board — " in html and "<li><b>U3 Machines</b>: no live board" in html
    assert f'data-reference="{REF}"' in html
