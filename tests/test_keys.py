"""Key rotation and expiry: a rotated-out key keeps working for its overlap and not a second
longer, an expired key is told apart from an unknown one, and a running server picks up a
rotation from the keys file (also when the file is swapped by symlink, as a Secret volume does)
without a restart. Times are fixed in the unit tests, so nothing depends on the clock."""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
import yaml

from service.keys import KeysError, add_key, hash_key, load_keyring
from tests.conftest import ROOT, assert_problem, in_process, start_server, stop_server

T0 = dt.datetime(2026, 12, 3, 12, 0, tzinfo=dt.UTC)
HOUR = dt.timedelta(hours=1)


def test_rotation_keeps_the_old_key_for_its_overlap_only(tmp_path: Path) -> None:
    keys = tmp_path / "keys.yaml"
    old = add_key(keys, "usher-desk", now=T0)
    new = add_key(keys, "usher-desk", rotate=True, overlap=2 * HOUR, now=T0)
    ring = load_keyring(keys)
    for moment, old_ok in ((T0, True), (T0 + 2 * HOUR - dt.timedelta(seconds=1), True)):
        assert (ring.identify(old, moment) is not None) is old_ok
    assert ring.identify(old, T0 + 2 * HOUR) is None  # the window is half-open: [T0, T0 + 2h)
    # A time without a zone is UTC, as in the keys file, whatever the machine's zone.
    with _local_zone("Etc/GMT+5"):
        naive = (T0 + 2 * HOUR).replace(tzinfo=None)
        assert ring.identify(old, naive - dt.timedelta(seconds=1)) is not None
        assert ring.identify(old, naive) is None
    assert ring.match(old) is not None  # still known, so the service can say "expired"
    assert ring.identify(new, T0 + 1000 * HOUR) is not None
    assert ring.names("client") == ["usher-desk"]  # one name, however many hashes
    # A second rotation after the first window closed drops the dead hash from the file.
    newest = add_key(keys, "usher-desk", rotate=True, overlap=HOUR, now=T0 + 3 * HOUR)
    stored = yaml.safe_load(keys.read_text())["clients"]["usher-desk"]
    assert stored["sha256"] == hash_key(newest)
    assert [p["sha256"] for p in stored["previous"]] == [hash_key(new)]


def test_expiry_caps_the_overlap_and_is_reported(tmp_path: Path) -> None:
    keys = tmp_path / "keys.yaml"
    old = add_key(keys, "surtitle-booth", expires_in=dt.timedelta(days=3), now=T0)
    ring = load_keyring(keys)
    assert ring.identify(old, T0 + dt.timedelta(days=3)) is None
    (entry,) = ring.describe(T0 + dt.timedelta(days=1), warn_days=14)
    assert entry["expires"] == "2026-12-06T12:00:00Z"
    assert entry["days_left"] == 2.0 and entry["near_expiry"] and not entry["expired"]
    assert not ring.describe(T0, warn_days=1)[0]["near_expiry"]
    # Rotating a key that expires in 3 days with a 10-day overlap keeps it only until expiry.
    add_key(keys, "surtitle-booth", rotate=True, overlap=dt.timedelta(days=10), now=T0)
    ring = load_keyring(keys)
    assert ring.identify(old, T0 + dt.timedelta(days=3)) is None
    (entry,) = ring.describe(T0, warn_days=14)
    assert entry["expires"] is None and entry["previous_accepted_until"] == ["2026-12-06T12:00:00Z"]


@pytest.mark.parametrize(
    ("entry", "needle"),
    [
        ({"sha256": "z" * 64}, "not hexadecimal"),
        ({"sha256": "a" * 63}, "64 hex digits"),
        ({"sha256": "a" * 64, "expires": "next tuesday"}, "ISO 8601"),
        ({"sha256": "a" * 64, "previous": [{"sha256": "b" * 64}]}, "until"),
        ({"sha256": "a" * 64, "owner": "x"}, "expected"),
    ],
)
def test_bad_entries_are_refused_with_their_place(
    tmp_path: Path, entry: dict[str, object], needle: str
) -> None:
    keys = tmp_path / "keys.yaml"
    keys.write_text(yaml.safe_dump({"clients": {"usher-desk": entry}}))
    with pytest.raises(KeysError, match=needle) as caught:
        load_keyring(keys)
    assert "clients.usher-desk" in str(caught.value)
    with pytest.raises(KeysError):  # and never rewritten by a rotation
        add_key(keys, "usher-desk", rotate=True)


def test_an_expired_key_is_told_apart_from_an_unknown_one(registry: Path, tmp_path: Path) -> None:
    keys = tmp_path / "keys.yaml"
    keys.write_text(
        yaml.safe_dump(
            {"clients": {"usher-desk": {"sha256": hash_key("ks_old"), "expires": "2026-01-01"}}}
        )
    )
    with in_process(registry, keys=keys) as client:
        headers = {"Authorization": "Bearer ks_old"}
        got = client.post("/v1/pick", json={"logits": [0.0, 1.0]}, headers=headers)
        assert_problem(got, 401, "expired at 2026-01-01")
        got = client.post("/v1/pick", json={"logits": [0.0, 1.0]}, headers=AUTH_NOBODY)
        assert_problem(got, 401, "not known")


AUTH_NOBODY = {"Authorization": "Bearer ks_nobody"}


def test_rotation_needs_a_key_to_rotate(tmp_path: Path) -> None:
    with pytest.raises(KeysError, match="no key to rotate"):
        add_key(tmp_path / "keys.yaml", "usher-desk", rotate=True)


def _cli(*args: str) -> str:
    done = subprocess.run(
        [sys.executable, "-m", "service.cli", "keys", "add", *args],
        capture_output=True,
        text=True,
        check=True,
        cwd=ROOT,
    )
    return done.stdout.strip()


def _pick(base: str, key: str) -> httpx.Response:
    logits = np.linspace(-2, 2, 50, dtype=np.float32).tolist()
    return httpx.post(
        f"{base}/v1/pick",
        json={"logits": logits, "seed": 1},
        headers={"Authorization": f"Bearer {key}"},
        timeout=10,
    )


def _until(condition: object, seconds: float = 10.0) -> None:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if condition():  # type: ignore[operator]
            return
        time.sleep(0.2)
    raise AssertionError("the server did not pick up the keys file in time")


def test_a_running_server_picks_up_a_rotation_through_a_swapped_symlink(
    registry: Path, tmp_path: Path
) -> None:
    # The layout a Kubernetes Secret volume has: keys.yaml -> ..data/keys.yaml, and ..data a
    # symlink to a timestamped folder that an update replaces in one rename.
    volume = tmp_path / "secret"
    first = volume / "..2026_12_03_12_00_00.1"
    first.mkdir(parents=True)
    usher = _cli("usher-desk", "--keys", str(first / "keys.yaml"))
    admin = _cli("stage-manager", "--admin", "--keys", str(first / "keys.yaml"))
    (volume / "..data").symlink_to(first.name)
    (volume / "keys.yaml").symlink_to("..data/keys.yaml")
    server = start_server(
        registry,
        workers=2,
        KEEPSET_KEYS=str(volume / "keys.yaml"),
        KEEPSET_RELOAD_POLL_SECONDS="0.3",
    )
    try:
        base = server.base_url
        assert _pick(base, usher).status_code == 200
        # The update: a new folder with the rotated file, then the atomic swap of ..data.
        second = volume / "..2026_12_03_12_05_00.2"
        second.mkdir()
        (second / "keys.yaml").write_bytes((first / "keys.yaml").read_bytes())
        rotated = _cli(
            "usher-desk", "--rotate", "--overlap-hours", "1", "--expires-days", "5",
            "--keys", str(second / "keys.yaml"),
        )  # fmt: skip
        (volume / "..data_tmp").symlink_to(second.name)
        os.replace(volume / "..data_tmp", volume / "..data")
        # Every worker takes the new key; the old one keeps working through the overlap.
        _until(lambda: all(_pick(base, rotated).status_code == 200 for _ in range(8)))
        assert all(_pick(base, usher).status_code == 200 for _ in range(8))
        routes = httpx.get(
            f"{base}/v1/routes", headers={"Authorization": f"Bearer {admin}"}, timeout=10
        ).json()
        entry = next(k for k in routes["keys"] if k["name"] == "usher-desk")
        assert entry["near_expiry"] and 4.9 < entry["days_left"] <= 5.0
        assert len(entry["previous_accepted_until"]) == 1
        # A rotation with no overlap ends the old key at once.
        third = volume / "..2026_12_03_12_10_00.3"
        third.mkdir()
        (third / "keys.yaml").write_bytes((second / "keys.yaml").read_bytes())
        _cli(
            "usher-desk", "--rotate", "--overlap-hours", "0",
            "--keys", str(third / "keys.yaml"),
        )  # fmt: skip
        (volume / "..data_tmp").symlink_to(third.name)
        os.replace(volume / "..data_tmp", volume / "..data")
        # (the first key too, though its own window had most of an hour left).
        _until(lambda: all(_pick(base, rotated).status_code == 401 for _ in range(8)))
        assert_problem(_pick(base, rotated), 401, "not known")
        assert_problem(_pick(base, usher), 401, "not known")
        # A broken keys file keeps the last good keys.
        (volume / "..data" / "keys.yaml").unlink()
        time.sleep(1.0)
        assert _pick(base, admin).status_code == 403  # still known: an admin key, not a client
    finally:
        stop_server(server)


@contextlib.contextmanager
def _local_zone(zone: str) -> Iterator[None]:
    """The process's local time zone set to ``zone`` (POSIX ``TZ``) for a while."""
    before = os.environ.get("TZ")
    os.environ["TZ"] = zone
    time.tzset()
    try:
        yield
    finally:
        if before is None:
            del os.environ["TZ"]
        else:
            os.environ["TZ"] = before
        time.tzset()
