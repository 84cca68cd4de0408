"""Receipts, proofs and checkpoints: the Python verifier (holdout_ledger.verify) against
published RFC 6962/9162 test vectors, against the daemon's own tree code for every tree size
1..64, and end to end (a team proves its receipt with nothing but the receipt, a proof, a
checkpoint and the daemon's verifier key).

The verifier is written from RFC 9162 section 2.1 alone and shares no code with the daemon.
"""

import base64
import json
import subprocess

import pandas as pd
import pytest

import holdout_ledger as hl
from holdout_ledger import verify as v

from conftest import BIN

# Leaf inputs and tree heads of the Certificate Transparency reference tree, as published in
# transparency-dev/merkle (testonly/constants.go, proof/verify_test.go; Apache-2.0). RFC 9162
# keeps RFC 6962's hashing, so the values hold for both.
REF_LEAVES = ["", "00", "10", "2021", "3031", "40414243", "5051525354555657",
              "606162636465666768696a6b6c6d6e6f"]
REF_ROOTS = [
    "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855",
    "6e340b9cffb37a989ca544e6bb780a2c78901d3fb33738768511a30617afa01d",
    "fac54203e7cc696cf0dfcb42c92a1d9dbaf70ad9e621f4bd8d98662f00e3c125",
    "aeb6bcfe274b70a14fb067a5e5578264db0fa9b51af5e0ba159158f329e06e77",
    "d37ee418976dd95753c1c73862b9398fa2a2cf9b4ff0fdfe8b30cd95209614b7",
    "4e3bbb1f7b478dcfe71fb631631519a3bca12c9aefca1612bfce4c13a86264d4",
    "76e67dadbcdf1e10e1b74ddc608abd2f98dfb16fbce75277b5232a127f2087ef",
    "ddb89be403809e325750d3d263cd78929c2942b7942a34b77e122c9594a74c8c",
    "5dc9da79a70659a9ad559cb701ded9a2ab9d823aad2f4960cfe370eff4604328",
]
# (leaf index 0-based, tree size, path); the source numbers leaves from 1.
REF_INCLUSION = [
    (0, 8, ["96a296d224f285c67bee93c30f8a309157f0daa35dc5b87e410b78630a09cfc7",
            "5f083f0a1a33ca076a95279832580db3e0ef4584bdff1f54c8a360f50de3031e",
            "6b47aaf29ee3c2af9af889bc1fb9254dabd31177f16232dd6aab035ca39bf6e4"]),
    (5, 8, ["bc1a0643b12e4d2d7c77918f44e0f4f79a838b6cf9ec5b5c283e1f4d88599e6b",
            "ca854ea128ed050b41b35ffc1b87b8eb2bde461e9e3b5596ece6b9d5975a0ae0",
            "d37ee418976dd95753c1c73862b9398fa2a2cf9b4ff0fdfe8b30cd95209614b7"]),
    (2, 3, ["fac54203e7cc696cf0dfcb42c92a1d9dbaf70ad9e621f4bd8d98662f00e3c125"]),
    (1, 5, ["6e340b9cffb37a989ca544e6bb780a2c78901d3fb33738768511a30617afa01d",
            "5f083f0a1a33ca076a95279832580db3e0ef4584bdff1f54c8a360f50de3031e",
            "bc1a0643b12e4d2d7c77918f44e0f4f79a838b6cf9ec5b5c283e1f4d88599e6b"]),
]
REF_CONSISTENCY = [
    (1, 1, []),
    (1, 8, ["96a296d224f285c67bee93c30f8a309157f0daa35dc5b87e410b78630a09cfc7",
            "5f083f0a1a33ca076a95279832580db3e0ef4584bdff1f54c8a360f50de3031e",
            "6b47aaf29ee3c2af9af889bc1fb9254dabd31177f16232dd6aab035ca39bf6e4"]),
    (6, 8, ["0ebc5d3437fbe2db158b9f126a1d118e308181031d0a949f8dededebc558ef6a",
            "ca854ea128ed050b41b35ffc1b87b8eb2bde461e9e3b5596ece6b9d5975a0ae0",
            "d37ee418976dd95753c1c73862b9398fa2a2cf9b4ff0fdfe8b30cd95209614b7"]),
    (2, 5, ["5f083f0a1a33ca076a95279832580db3e0ef4584bdff1f54c8a360f50de3031e",
            "bc1a0643b12e4d2d7c77918f44e0f4f79a838b6cf9ec5b5c283e1f4d88599e6b"]),
    (6, 7, ["0ebc5d3437fbe2db158b9f126a1d118e308181031d0a949f8dededebc558ef6a",
            "b08693ec2e721597130641e8211e7eedccb4c26413963eee6c1e2ed16ffb1a5f",
            "d37ee418976dd95753c1c73862b9398fa2a2cf9b4ff0fdfe8b30cd95209614b7"]),
]


def h(x):
    return bytes.fromhex(x)


def flips(path, every_bit=False):
    """Proofs with exactly one bit of one hash flipped: every byte of every hash (bit
    `byte % 8` of it, so each bit position is hit four times per hash), or all 256 bits."""
    for i, node in enumerate(path):
        for bit in range(256) if every_bit else (8 * k + k % 8 for k in range(32)):
            b = bytearray(node)
            b[bit // 8] ^= 1 << (bit % 8)
            yield path[:i] + [bytes(b)] + path[i + 1:]


def rejects(fn, *args):
    try:
        fn(*args)
    except v.VerificationError:
        return True
    return False


# -- the verifier against the published vectors ----------------------------------------------


def test_tree_heads_match_the_published_reference_tree():
    leaves = [h(x) for x in REF_LEAVES]
    for n in range(0, 9):
        assert v.tree_hash(leaves[:n]).hex() == REF_ROOTS[n], n


def test_inclusion_proofs_match_the_published_ones_and_corruptions_fail():
    leaves = [h(x) for x in REF_LEAVES]
    for index, size, want in REF_INCLUSION:
        path = v.inclusion_path(index, leaves[:size])
        assert [p.hex() for p in path] == want
        root = h(REF_ROOTS[size])
        leaf = v.leaf_hash(leaves[index])
        v.verify_inclusion(leaf, index, size, path, root)
        for bad in flips(path, every_bit=True):
            assert rejects(v.verify_inclusion, leaf, index, size, bad, root)
        # The corruptions the source's tests apply (a wrong index, a tree twice or half as
        # large); some other sizes share the leaf's path shape and would verify, which is why
        # a proof's size must equal the signed checkpoint's.
        for i2, s2 in [(index - 1, size), (index + 1, size), (index ^ 2, size),
                       (index, size * 2), (index, size // 2)]:
            assert rejects(v.verify_inclusion, leaf, i2, s2, path, root), (i2, s2)
        assert rejects(v.verify_inclusion, leaf, index, size, path + [root], root)
        assert rejects(v.verify_inclusion, leaf, index, size, [root] + path, root)
        if path:
            assert rejects(v.verify_inclusion, leaf, index, size, path[:-1], root)


def test_consistency_proofs_match_the_published_ones_and_corruptions_fail():
    leaves = [h(x) for x in REF_LEAVES]
    for first, second, want in REF_CONSISTENCY:
        path = v.consistency_path(first, leaves[:second])
        assert [p.hex() for p in path] == want
        r1, r2 = h(REF_ROOTS[first]), h(REF_ROOTS[second])
        v.verify_consistency(first, second, path, r1, r2)
        if not path:
            continue
        for bad in flips(path, every_bit=True):
            assert rejects(v.verify_consistency, first, second, bad, r1, r2)
        for f2, s2 in [(first - 1, second), (first + 1, second), (first ^ 2, second),
                       (first, second * 2), (first, second // 2)]:
            assert rejects(v.verify_consistency, f2, s2, path, r1, r2), (f2, s2)
        assert rejects(v.verify_consistency, first, second, path, r2, r1)
        assert rejects(v.verify_consistency, first, second, [], r1, r2)
        assert rejects(v.verify_consistency, first, second, path[:-1], r1, r2)
        assert rejects(v.verify_consistency, first, second, path + [r1], r1, r2)


def test_signed_note_round_trip_and_tampering():
    """A checkpoint signed here with the format's rules verifies; any change to it fails."""
    ed = pytest.importorskip("cryptography.hazmat.primitives.asymmetric.ed25519")
    from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

    sk = ed.Ed25519PrivateKey.from_private_bytes(bytes(range(32)))
    pk = sk.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    kid = v._key_id(v.KEY_NAME, pk)
    blob = base64.b64encode(b"\x01" + pk).decode()
    key = f"{v.KEY_NAME}+{kid.hex()}+{blob}"
    root = base64.b64encode(h(REF_ROOTS[8])).decode()
    body = f"holdout-ledger/tiles\n8\n{root}\ntime 2026-12-03T20:00:00Z\n"
    sig = base64.b64encode(kid + sk.sign(body.encode())).decode()
    note = f"{body}\n\u2014 {v.KEY_NAME} {sig}\n"
    cp = v.Checkpoint.parse(note)
    assert (cp.chain, cp.tree_size, cp.root.hex()) == ("tiles", 8, REF_ROOTS[8])
    cp.verify(v.VerifierKey.parse(key))
    v.Checkpoint.parse(note).verify(v.VerifierKey.parse(pk.hex()))
    tampered = note.replace("\n8\n", "\n9\n", 1)
    assert rejects(lambda: v.Checkpoint.parse(tampered).verify(v.VerifierKey.parse(key)))
    other = ed.Ed25519PrivateKey.from_private_bytes(bytes(range(1, 33)))
    opk = other.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    assert rejects(lambda: cp.verify(v.VerifierKey.parse(opk.hex())))
    bad_kid = key.split("+")
    bad_kid[1] = "00000000"
    assert rejects(v.VerifierKey.parse, "+".join(bad_kid))


def test_proof_files_must_hold_hashes_sizes_and_indices_only():
    ok = {"leaf_index": 0, "tree_size": 1, "inclusion_path": []}
    assert v.InclusionProof.parse(json.dumps(ok)).tree_size == 1
    assert rejects(v.InclusionProof.parse, {**ok, "salt": "00"})
    assert rejects(v.InclusionProof.parse, {**ok, "leaf_index": "0"})
    assert rejects(v.InclusionProof.parse, {**ok, "inclusion_path": ["AB" * 32]})


# -- the daemon's tree code for every size 1..64 ---------------------------------------------


def test_daemon_trees_and_proofs_match_this_verifier_for_every_size_to_64():
    out = subprocess.run([str(BIN), "merkle-vectors", "--max-size", "64"],
                         capture_output=True, text=True, check=True).stdout
    vec = json.loads(out)
    leaves = [h(x) for x in vec["leaves"]]
    assert len(leaves) == 64
    for i, leaf in enumerate(leaves):
        assert leaf == v._sha256(f"leaf {i}".encode())
    for n in range(1, 65):
        assert vec["roots"][n - 1] == v.tree_hash(leaves[:n]).hex(), n
    seen = set()
    for p in vec["inclusion"]:
        assert set(p) == v.INCLUSION_KEYS
        i, n = p["leaf_index"], p["tree_size"]
        seen.add((i, n))
        path = [h(x) for x in p["inclusion_path"]]
        assert path == v.inclusion_path(i, leaves[:n]), (i, n)
        root, leaf = h(vec["roots"][n - 1]), v.leaf_hash(leaves[i])
        v.verify_inclusion(leaf, i, n, path, root)
        for bad in flips(path):
            assert rejects(v.verify_inclusion, leaf, i, n, bad, root), (i, n)
    assert seen == {(i, n) for n in range(1, 65) for i in range(n)}
    seen = set()
    for p in vec["consistency"]:
        assert set(p) == v.CONSISTENCY_KEYS
        m, n = p["first_size"], p["second_size"]
        seen.add((m, n))
        path = [h(x) for x in p["consistency_path"]]
        assert path == v.consistency_path(m, leaves[:n]), (m, n)
        r1, r2 = h(vec["roots"][m - 1]), h(vec["roots"][n - 1])
        v.verify_consistency(m, n, path, r1, r2)
        for bad in flips(path):
            assert rejects(v.verify_consistency, m, n, bad, r1, r2), (m, n)
    assert seen == {(m, n) for n in range(1, 65) for m in range(1, n + 1)}


# -- end to end: a team proves its own receipt -----------------------------------------------

CLASSES = ["amber", "green"]
N = 1000


def lamps():
    """Invented: 1,000 signal lamps, each inspected amber or green."""
    ids = [f"lamp-{i:04d}" for i in range(N)]
    return pd.DataFrame({"id": ids, "label": [CLASSES[(i * 5 + i // 7) % 2] for i in range(N)]})


def guess(labels, wrong_every):
    pred = labels["label"].copy()
    for i in range(0, N, wrong_every):
        pred[i] = "green" if pred[i] == "amber" else "amber"
    return pd.DataFrame({"id": labels["id"], "prediction": pred})


def test_a_team_verifies_its_receipt_offline_with_only_receipt_proof_checkpoint_and_key(
        daemon, tmp_path):
    labels = lamps()
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("lamps", labels, metric="error", method="exact", classes=CLASSES,
                             delta=0.05, schedule="even:6", answers="rounded:0.01", tolerance=0.2)
    token = daemon.add_user("odile", "analyst", team="quay")
    with hl.connect(daemon.url, token) as team:
        first = team.submit("lamps", guess(labels, 9))
        proof = team.prove("lamps", first.receipt.entry_hash)
        for k in (7, 5, 4):  # more entries after the receipt
            team.submit("lamps", guess(labels, k))
        later = team.prove("lamps", first.receipt.entry_hash,
                           since=proof.checkpoint_size)

    # Offline from here: the receipt, the proofs, the checkpoints and the key only.
    receipt = {"holdout": first.receipt.holdout, "entry_hash": first.receipt.entry_hash}
    got = v.verify_receipt(receipt, proof.inclusion_proof, proof.checkpoint,
                           proof.verifier_key)
    assert got["holdout"] == "lamps" and got["tree_size"] >= 2
    again = v.verify_receipt(receipt, later.inclusion_proof, later.checkpoint,
                             later.verifier_key)
    assert again["tree_size"] == got["tree_size"] + 3 and again["leaf_index"] == got["leaf_index"]
    v.verify_checkpoints(proof.checkpoint, later.checkpoint, later.consistency_proof,
                         later.verifier_key)

    # Nothing but hashes, sizes and indices in the proofs.
    assert set(json.loads(later.inclusion_proof)) == v.INCLUSION_KEYS
    assert set(json.loads(later.consistency_proof)) == v.CONSISTENCY_KEYS

    # Another entry's receipt, a changed checkpoint, or a proof for another tree fail.
    wrong = {**receipt, "entry_hash": "0" * 64}
    assert rejects(v.verify_receipt, wrong, proof.inclusion_proof, proof.checkpoint,
                   proof.verifier_key)
    assert rejects(v.verify_receipt, receipt, later.inclusion_proof, proof.checkpoint,
                   proof.verifier_key)
    bent = proof.checkpoint.replace("holdout-ledger/lamps", "holdout-ledger/lampz")
    assert rejects(v.verify_receipt, receipt, proof.inclusion_proof, bent, proof.verifier_key)

    # The command line says the same, with exit codes.
    files = {}
    for name, text in [("receipt.json", json.dumps(receipt)),
                       ("proof.json", later.inclusion_proof), ("cp.txt", later.checkpoint),
                       ("old.txt", proof.checkpoint), ("cons.json", later.consistency_proof),
                       ("key.txt", later.verifier_key)]:
        files[name] = tmp_path / name
        files[name].write_text(text)
    assert v.main(["receipt", "--receipt", str(files["receipt.json"]), "--proof",
                   str(files["proof.json"]), "--checkpoint", str(files["cp.txt"]), "--key",
                   str(files["key.txt"])]) == 0
    assert v.main(["consistency", "--proof", str(files["cons.json"]), "--old",
                   str(files["old.txt"]), "--new", str(files["cp.txt"]), "--key",
                   str(files["key.txt"])]) == 0
    files["receipt.json"].write_text(json.dumps(wrong))
    assert v.main(["receipt", "--receipt", str(files["receipt.json"]), "--proof",
                   str(files["proof.json"]), "--checkpoint", str(files["cp.txt"]), "--key",
                   str(files["key.txt"])]) == 1


def test_exported_entry_hashes_follow_rfc8785_with_an_independent_canonicaliser(daemon,
                                                                                   tmp_path):
    """Entries of a new chain hash the RFC 8785 canonical JSON; `rfc8785` (PyPI, not the
    daemon's code) recomputes every hash of the export, and the tree of those hashes has the
    root the daemon signs."""
    pytest.importorskip("rfc8785")
    labels = lamps()
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("lamps", labels, metric="error", method="exact", classes=CLASSES,
                             delta=0.05, schedule="even:4", answers="rounded:0.01", tolerance=0.2)
    token = daemon.add_user("odile", "analyst", team="quay")
    with hl.connect(daemon.url, token) as team:
        for k in (9, 6):
            team.submit("lamps", guess(labels, k))
        proof = team.prove("lamps")
    auditor = daemon.add_user("pim", "auditor")
    out = tmp_path / "lamps.jsonl"
    daemon.cli(auditor, "export", "lamps", "--out", str(out), check=0)
    entries = [json.loads(line) for line in out.read_text().splitlines() if line.strip()]
    chain = [e for e in entries if e.get("chain") == "lamps" and "hash" in e]
    assert len(chain) >= 3
    for e in chain:
        assert v.entry_hash(e) == e["hash"], e["seq"]
    cp = v.Checkpoint.parse(proof.checkpoint)
    cp.verify(v.VerifierKey.parse(proof.verifier_key))
    assert v.leaves_root([e["hash"] for e in chain][:cp.tree_size]) == cp.root


def test_committed_v0_5_0_fixture_entries_hash_as_rfc8785_says():
    """The committed 0.5.0 ledger fixtures (tests/fixtures/ledgers, written by the daemon's
    fixture writer) re-hash, entry by entry, with the independent `rfc8785` package, and every
    entry's `prev_hash` is the hash before it."""
    pytest.importorskip("rfc8785")
    from conftest import REPO

    for name in ("v0.5.0", "v0.5.0-round"):
        lines = (REPO / "tests" / "fixtures" / "ledgers" / f"{name}.export.jsonl").read_text()
        rows = [json.loads(x) for x in lines.splitlines() if x.strip()]
        header, entries = rows[0], [r for r in rows[1:] if "hash" in r]
        assert header["encoding"] == v.ENCODING_V2 and len(entries) >= 10
        prev = {}
        for e in entries:
            assert v.entry_hash(e) == e["hash"], (name, e["chain"], e["seq"])
            assert e["prev_hash"] == prev.get(e["chain"], "0" * 64)
            prev[e["chain"]] = e["hash"]
