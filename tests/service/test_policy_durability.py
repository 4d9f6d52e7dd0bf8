"""The policy store survives crashes and damage: which policy is active after a restart.

Fault injection: a subprocess uploads a policy and is killed (SIGKILL) just before each
``fsync``/``rename`` of the durable write sequence; files truncated as a power cut can leave
them; the pointer missing or cut short. The expected answers follow from POSIX ``rename``
being atomic (IEEE Std 1003.1, rename(): "the old and new names are ... either both linked or
... not") and from the store writing a policy file before the pointer that names it.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
import textwrap
from pathlib import Path

import httpx
import pytest

from dueroute.service.server.policy_store import PolicyDamaged, PolicyStore
from tests.service.conftest import ADMIN_TOKEN, REPO, LiveServer, policy_bytes

AUTH = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
OCTET = {"content-type": "application/octet-stream"}

A, B = policy_bytes(seed=11), policy_bytes(seed=12)
SHA_A, SHA_B = (hashlib.sha256(x).hexdigest() for x in (A, B))

# The child activates A, then uploads B and kills itself just before the k-th fsync/rename
# of that upload: 1 fsync(B tmp), 2 rename(B), 3 fsync(files/), 4 fsync(pointer tmp),
# 5 rename(pointer), 6 fsync(policy dir).
_CHILD = textwrap.dedent(
    """
    import os, signal, sys
    from pathlib import Path
    from dueroute.service.server import policy_store as ps

    folder, kill_at = Path(sys.argv[1]), int(sys.argv[2])
    store = ps.PolicyStore(folder, 1_000_000)
    store.startup(None, None)
    store.swap(Path(sys.argv[3]).read_bytes())
    calls = {"n": 0}

    def step(real):
        def wrapped(*args):
            calls["n"] += 1
            if calls["n"] == kill_at:
                os.kill(os.getpid(), signal.SIGKILL)
            return real(*args)
        return wrapped

    os.fsync, os.replace = step(os.fsync), step(os.replace)
    store.swap(Path(sys.argv[4]).read_bytes())
    print("finished without being killed")
    """
)


def _upload_killed_at(tmp_path: Path, kill_at: int) -> tuple[Path, int]:
    folder = tmp_path / "policies"
    (tmp_path / "a.onnx").write_bytes(A)
    (tmp_path / "b.onnx").write_bytes(B)
    proc = subprocess.run(
        [sys.executable, "-c", _CHILD, str(folder), str(kill_at)]
        + [str(tmp_path / "a.onnx"), str(tmp_path / "b.onnx")],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
    )
    return folder, proc.returncode


@pytest.mark.parametrize(
    ("kill_at", "active_after"),
    [(1, SHA_A), (2, SHA_A), (3, SHA_A), (4, SHA_A), (5, SHA_A), (6, SHA_B), (99, SHA_B)],
)
def test_killed_during_an_upload_restarts_with_the_old_or_the_new_policy(
    tmp_path: Path, kill_at: int, active_after: str
):
    folder, code = _upload_killed_at(tmp_path, kill_at)
    assert code == (-9 if kill_at != 99 else 0)
    leftovers = sorted(p.name for p in folder.rglob(".tmp-*"))
    store = PolicyStore(folder, 1_000_000)
    active = store.startup(None, None)
    assert active.sha256 == active_after, (kill_at, leftovers)
    assert store.damaged == []  # an interrupted write is not damage: nothing half-written
    assert not list(folder.rglob(".tmp-*"))  # what the crash left is cleaned up
    if active_after == SHA_A:
        assert store.history == []
    else:
        assert store.history == [SHA_A] and store.rollback().sha256 == SHA_A
    print(
        f"\nkilled before step {kill_at}: left {leftovers or 'nothing'}; active {active_after[:8]}"
    )


def _two_uploads(folder: Path) -> PolicyStore:
    store = PolicyStore(folder, 1_000_000)
    store.startup(None, None)
    store.swap(A)
    store.swap(B)
    return store


def test_a_truncated_active_policy_falls_back_to_the_history_and_says_so(tmp_path: Path):
    folder = tmp_path / "p"
    _two_uploads(folder)
    stored_b = folder / "files" / f"{SHA_B}.onnx"
    stored_b.write_bytes(B[: len(B) // 2])  # what a power cut can leave of an unsynced file
    store = PolicyStore(folder, 1_000_000)
    active = store.startup(None, None)
    assert active.sha256 == SHA_A and active.source == "policy_dir"
    (damage,) = store.damaged
    assert damage["file"] == f"files/{SHA_B}.onnx" and damage["was_active"] is True
    assert "not the sha256 its name says" in damage["problem"]
    assert SHA_A in damage["action"]
    assert store.history == []  # A came from the history: a rollback has nothing before it
    # the pointer still names B, so the next start reports the damage again
    assert json.loads((folder / "active.json").read_text())["active"] == SHA_B
    # with 'refuse', the start stops with a message naming the file
    with pytest.raises(PolicyDamaged, match=str(stored_b)):
        PolicyStore(folder, 1_000_000, on_damaged="refuse").startup(None, None)
    # uploading B again rewrites the damaged file; the next start is clean
    store.swap(B)
    assert hashlib.sha256(stored_b.read_bytes()).hexdigest() == SHA_B and store.damaged == []
    again = PolicyStore(folder, 1_000_000)
    assert again.startup(None, None).sha256 == SHA_B and again.damaged == []


def test_a_damaged_history_entry_is_skipped_by_rollback_and_reported(tmp_path: Path):
    folder = tmp_path / "p"
    store = _two_uploads(folder)
    c = policy_bytes(seed=13)
    store.swap(c)  # history: A, B
    (folder / "files" / f"{SHA_B}.onnx").write_bytes(b"\0" * 100)
    store = PolicyStore(folder, 1_000_000)
    assert store.startup(None, None).sha256 == hashlib.sha256(c).hexdigest()
    assert [d["sha256"] for d in store.damaged] == [SHA_B]
    assert store.damaged[0]["was_active"] is False and store.damaged[0]["action"] == "not used"
    assert store.rollback().sha256 == SHA_A  # B skipped


def test_a_missing_or_cut_pointer(tmp_path: Path):
    folder = tmp_path / "p"
    _two_uploads(folder)
    pointer = folder / "active.json"
    text = pointer.read_text()
    pointer.write_text(text[: len(text) // 2])  # cut short
    store = PolicyStore(folder, 1_000_000)
    # which policy was active is unknown: the newest stored good file, and the damage said
    assert store.startup(None, None).sha256 == SHA_B
    assert store.damaged[0]["file"] == "active.json" and "unreadable" in store.damaged[0]["problem"]
    with pytest.raises(PolicyDamaged, match="active.json"):
        PolicyStore(folder, 1_000_000, on_damaged="refuse").startup(None, None)
    pointer.unlink()  # missing: the state before the first upload (the default, or none)
    default = tmp_path / "shipped.onnx"
    default.write_bytes(policy_bytes(seed=14))
    store = PolicyStore(folder, 1_000_000)
    assert store.startup(None, default).source == "default:shipped.onnx"
    (damage,) = store.damaged
    assert damage["file"] == "active.json" and "missing while 2 stored policy" in damage["problem"]
    # the shipped default alone (never uploaded) is the normal case: nothing to report
    fresh = PolicyStore(tmp_path / "fresh", 1_000_000)
    fresh.startup(None, default)
    fresh = PolicyStore(tmp_path / "fresh", 1_000_000)
    assert fresh.startup(None, default).source == "default:shipped.onnx" and fresh.damaged == []


def test_a_real_server_reports_a_damaged_active_policy(tiny_graph_path: Path, tmp_path: Path):
    """End to end: upload two policies to a running server, stop it, truncate the active file,
    start it again: it serves the previous policy and says so on /v1/policy, /readyz and
    /metrics, with file names only; re-uploading rewrites the file; with
    --on-damaged-policy refuse the start stops with one line naming the file."""
    env = {"DUEROUTE_ADMIN_TOKEN": ADMIN_TOKEN, "DUEROUTE_SHIPPED_POLICY": "false"}
    with LiveServer(tiny_graph_path, tmp_path, env=env) as srv:
        for data in (A, B):
            r = httpx.put(srv.url + "/v1/policy", content=data, headers={**AUTH, **OCTET})
            assert r.status_code == 200, r.text
        assert r.json()["previous_sha256"] == SHA_A
    stored_b = tmp_path / "policies" / "files" / f"{SHA_B}.onnx"
    stored_b.write_bytes(B[:100])
    with LiveServer(tiny_graph_path, tmp_path, env=env) as srv:
        info = httpx.get(srv.url + "/v1/policy").json()
        assert info["sha256"] == SHA_A and info["damaged"][0]["was_active"] is True
        assert info["damaged"][0]["file"] == f"files/{SHA_B}.onnx"
        ready = httpx.get(srv.url + "/readyz")
        assert ready.status_code == 200
        assert ready.json()["detail"]["policy_damaged"][0]["sha256"] == SHA_B
        assert str(tmp_path) not in ready.text + json.dumps(info)
        assert "dueroute_policy_damaged_files 1.0" in httpx.get(srv.url + "/metrics").text
        r = httpx.put(srv.url + "/v1/policy", content=B, headers={**AUTH, **OCTET})
        assert r.status_code == 200 and r.json()["damaged"] == []
        assert "dueroute_policy_damaged_files 0.0" in httpx.get(srv.url + "/metrics").text
    assert hashlib.sha256(stored_b.read_bytes()).hexdigest() == SHA_B
    stored_b.write_bytes(b"")
    proc = subprocess.run(
        [sys.executable, "-m", "dueroute", "serve", "--graph", str(tiny_graph_path)]
        + ["--policy-dir", str(tmp_path / "policies"), "--on-damaged-policy", "refuse"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=120,
        env={**__import__("os").environ, **env},
    )
    lines = [x for x in proc.stderr.splitlines() if x.startswith("dueroute: error:")]
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr[-2000:]
    assert str(stored_b) in lines[0] and "damaged" in lines[0]
