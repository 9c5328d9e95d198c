"""Wrong secrets for one key id are held back cheaply (finding 10).

After a few failures of one id, checks of it that would need scrypt are refused at once
(429 with Retry-After) for a short, growing, capped back-off; a secret this process has
verified is still accepted; other ids are untouched; unknown ids cost what known ones do.
Real scrypt (a handful of checks); the gate's clock is a fake one, so nothing sleeps.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
import sounding.service.keys as keys
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sounding.indexer.errors import AccessError
from sounding.service.auth import ReadCaller, open_keys
from sounding.service.keys import KeyStore
from sounding.service.settings import ServiceSettings


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def wrong(secret: str) -> str:
    return secret[:-1] + ("A" if secret[-1] != "A" else "B")


@pytest.fixture
def scrypt_runs(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    runs: list[int] = []
    real = keys.scrypt
    monkeypatch.setattr(keys, "scrypt", lambda *a: runs.append(1) or real(*a))
    return runs


def test_repeated_failures_of_one_id_are_refused_without_scrypt(
    tmp_path: Path, scrypt_runs: list[int]
) -> None:
    with KeyStore(tmp_path / "keys.db") as store:
        _, secret = store.create("ana", "read")
        _, other = store.create("bob", "read")
        store.authenticate(secret)  # ana's own client, verified once
        scrypt_runs.clear()
        failures = 0
        refused = None
        for _ in range(8):
            try:
                store.authenticate(wrong(secret))
            except AccessError as exc:
                if "not recognised" in str(exc):
                    failures += 1
                else:
                    refused = exc
                    break
        assert refused is not None, "eight wrong secrets in a row were all checked"
        assert failures == len(scrypt_runs) <= 5
        assert "too many failed attempts" in str(refused)
        assert 0 < getattr(refused, "retry_after", 0) <= 5
        # Held back: more wrong ones cost no scrypt; ana's verified secret still works;
        # bob's key, another id, is checked as usual.
        before = len(scrypt_runs)
        with pytest.raises(AccessError, match="too many failed attempts"):
            store.authenticate(wrong(secret))
        assert len(scrypt_runs) == before
        assert store.authenticate(secret).name == "ana"
        assert store.authenticate(other).name == "bob" and len(scrypt_runs) == before + 1


def test_the_back_off_is_short_grows_and_is_capped(tmp_path: Path) -> None:
    from sounding.service.backoff import FailureGate, TooManyAttempts

    clock = Clock()
    with KeyStore(tmp_path / "keys.db") as store:
        store.failures = FailureGate(clock=clock)
        _, secret = store.create("ana", "read")
        bad = wrong(secret)

        def attempt() -> float | None:
            try:
                store.authenticate(bad)
            except TooManyAttempts as exc:
                return exc.retry_after
            except AccessError:
                return None
            raise AssertionError("a wrong secret was accepted")

        assert [attempt() for _ in range(5)] == [None] * 5
        delays = []
        for _ in range(5):
            wait = attempt()
            assert wait is not None
            delays.append(wait)
            clock.now += wait  # the back-off ends: one check runs, and fails again
            assert attempt() is None
        assert delays == [1.0, 2.0, 4.0, 5.0, 5.0]
        # The owner, not yet verified by this process, is in after the back-off ends.
        clock.now += 5.0
        assert store.authenticate(secret).name == "ana"
        assert [attempt() for _ in range(4)] == [None] * 4  # failures were forgotten


def test_failures_are_forgotten_after_a_quiet_window() -> None:
    from sounding.service.backoff import FailureGate, TooManyAttempts

    clock = Clock()
    gate = FailureGate(threshold=3, window=60, clock=clock, max_ids=2)
    for _ in range(3):
        gate.failed("aaaaaaaaaaaa")
    with pytest.raises(TooManyAttempts):
        gate.admit("aaaaaaaaaaaa")
    gate.admit("bbbbbbbbbbbb")  # other ids are not held back
    clock.now += 61
    gate.admit("aaaaaaaaaaaa")
    for key_id in ("c" * 12, "d" * 12, "e" * 12):  # bounded memory: oldest ids dropped
        gate.failed(key_id)
    assert len(gate._records) == 2


def test_an_unknown_id_costs_one_scrypt_like_a_known_one(
    tmp_path: Path, scrypt_runs: list[int]
) -> None:
    """No timing oracle: an unknown id is checked against a dummy hash."""
    with KeyStore(tmp_path / "keys.db") as store:
        _, secret = store.create("ana", "read")
        scrypt_runs.clear()
        with pytest.raises(AccessError, match="not recognised"):
            store.authenticate(wrong(secret))
        with pytest.raises(AccessError, match="not recognised"):
            store.authenticate("snd_000000000000_" + secret[17:])
        assert len(scrypt_runs) == 2


@pytest.fixture
def app(tmp_path: Path) -> Iterator[tuple[TestClient, str]]:
    settings = ServiceSettings(index_dir=tmp_path)
    with KeyStore(settings.keys_file) as store:
        _, secret = store.create("ana", "read")
    application = FastAPI()
    application.state.settings = settings

    @application.get("/read")
    def read(caller: ReadCaller) -> dict:
        return {"name": caller.name}

    application.state.keys = open_keys(settings)
    with TestClient(application, client=("127.0.0.1", 50000)) as client:
        yield client, secret
    application.state.keys.close()


def test_the_service_answers_429_with_retry_after(app) -> None:
    client, secret = app
    statuses = [
        client.get("/read", headers={"Authorization": f"Bearer {wrong(secret)}"}).status_code
        for _ in range(7)
    ]
    assert statuses[:5] == [401] * 5 and statuses[5:] == [429, 429], statuses
    r = client.get("/read", headers={"Authorization": f"Bearer {wrong(secret)}"})
    assert r.status_code == 429 and 1 <= int(r.headers["retry-after"]) <= 5
    assert "too many failed attempts" in r.json()["detail"]
