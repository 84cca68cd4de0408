"""Offline verification of holdout-ledger receipts, proofs and checkpoints.

Nothing here talks to the daemon: a team that kept a receipt, an inclusion proof, a signed
checkpoint and the daemon's verifier key checks, with this module alone, that its entry is in
the ledger the daemon signed; an auditor checks that a later checkpoint extends an earlier one.

The formats (DEVELOPERS.md of the repository, "Receipts, proofs and checkpoints"):

* Each chain (one per holdout, ``@users`` for identities) is a Merkle tree as defined in
  RFC 9162 section 2.1.1. Leaf ``i`` is the entry whose number is ``i``; its leaf input is the
  32 raw bytes of the entry's hash, so the leaf hash is ``SHA-256(0x00 || entry hash)`` and an
  interior node ``SHA-256(0x01 || left || right)``.
* An inclusion proof is ``{"leaf_index", "tree_size", "inclusion_path"}`` and a consistency
  proof ``{"first_size", "second_size", "consistency_path"}`` (hex hashes): RFC 9162 sections
  2.1.3 and 2.1.4. Verification below follows the RFC's algorithms step by step.
* A checkpoint is a signed note: origin line ``holdout-ledger/CHAIN``, the tree size, the base64
  root hash, ``time ...``, optionally ``users SIZE ROOT`` (the identity chain's tree at the same
  moment), a blank line, then ``— NAME BASE64(keyid || Ed25519 signature)`` over the note body.
* A verifier key is ``NAME+KEYID_HEX+BASE64(0x01 || public key)``, with
  ``keyid = SHA-256(NAME || "\\n" || 0x01 || public key)[:4]``.
* Entries written with encoding ``holdout-ledger-entry/2`` hash the RFC 8785 canonical JSON of
  ``{"encoding", "chain", "seq", "kind", "salt", "prev", "body"}``.

What a verified proof shows: the daemon's key signed a tree that contains the entry named by the
receipt, unchanged. It says nothing about the statistics of the answer; the answer's interval
holds under the holdout's stated assumptions (i.i.d. rows, no label access except through
answers, the declared sharing assumption).

Command line::

    python -m holdout_ledger.verify receipt --receipt R.json --proof P.json \\
        --checkpoint C.txt --key KEY
    python -m holdout_ledger.verify consistency --proof P.json --old OLD.txt --new NEW.txt \\
        --key KEY

Signature checks need the ``cryptography`` package (``pip install holdout-ledger-client[verify]``);
entry hashes need ``rfc8785``.
"""

from __future__ import annotations

import argparse
import base64
import binascii
import hashlib
import json
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, List, Optional, Sequence, Union

KEY_NAME = "holdout-ledger"
ORIGIN_PREFIX = "holdout-ledger/"
ENCODING_V2 = "holdout-ledger-entry/2"
SIGNATURE_PREFIX = "\u2014 "  # EM DASH and a space, as in a signed note

INCLUSION_KEYS = frozenset({"leaf_index", "tree_size", "inclusion_path"})
CONSISTENCY_KEYS = frozenset({"first_size", "second_size", "consistency_path"})


class VerificationError(Exception):
    """A receipt, proof, checkpoint or key does not verify; the message says why."""


# -- RFC 9162 section 2.1: the tree --------------------------------------------------------


def _sha256(data: bytes) -> bytes:
    return hashlib.sha256(data).digest()


def leaf_hash(leaf_input: bytes) -> bytes:
    """``SHA-256(0x00 || leaf input)``."""
    return _sha256(b"\x00" + leaf_input)


def node_hash(left: bytes, right: bytes) -> bytes:
    """``SHA-256(0x01 || left || right)``."""
    return _sha256(b"\x01" + left + right)


def entry_leaf_hash(entry_hash_hex: str) -> bytes:
    """The leaf hash of an entry: its leaf input is the 32 bytes its hex hash names."""
    raw = _hex32(entry_hash_hex, "entry hash")
    return leaf_hash(raw)


def _split(n: int) -> int:
    """The largest power of two smaller than ``n`` (n > 1)."""
    k = 1
    while k << 1 < n:
        k <<= 1
    return k


def tree_hash(leaves: Sequence[bytes]) -> bytes:
    """MTH(D[n]) of RFC 9162 section 2.1.1 over leaf inputs, computed by its recursion."""
    n = len(leaves)
    if n == 0:
        return _sha256(b"")
    if n == 1:
        return leaf_hash(leaves[0])
    k = _split(n)
    return node_hash(tree_hash(leaves[:k]), tree_hash(leaves[k:]))


def inclusion_path(index: int, leaves: Sequence[bytes]) -> List[bytes]:
    """PATH(m, D[n]) of RFC 9162 section 2.1.3.1, by its recursion."""
    n = len(leaves)
    if not 0 <= index < n:
        raise ValueError(f"leaf index {index} outside a tree of {n}")
    if n == 1:
        return []
    k = _split(n)
    if index < k:
        return inclusion_path(index, leaves[:k]) + [tree_hash(leaves[k:])]
    return inclusion_path(index - k, leaves[k:]) + [tree_hash(leaves[:k])]


def consistency_path(first: int, leaves: Sequence[bytes]) -> List[bytes]:
    """PROOF(m, D[n]) of RFC 9162 section 2.1.4.1, by its recursion (1 <= m <= n)."""

    def subproof(m: int, d: Sequence[bytes], b: bool) -> List[bytes]:
        n = len(d)
        if m == n:
            return [] if b else [tree_hash(d)]
        k = _split(n)
        if m <= k:
            return subproof(m, d[:k], b) + [tree_hash(d[k:])]
        return subproof(m - k, d[k:], False) + [tree_hash(d[:k])]

    if not 1 <= first <= len(leaves):
        raise ValueError(f"first size {first} outside 1..{len(leaves)}")
    return subproof(first, leaves, True)


def verify_inclusion(leaf: bytes, index: int, size: int, path: Sequence[bytes],
                     root: bytes) -> None:
    """RFC 9162 section 2.1.3.2, step by step; raises :class:`VerificationError`."""
    if index >= size or index < 0:
        raise VerificationError(f"leaf index {index} is not below tree size {size}")
    fn, sn, r = index, size - 1, leaf
    for p in path:
        if sn == 0:
            raise VerificationError("the inclusion path is longer than the tree allows")
        if fn & 1 or fn == sn:
            r = node_hash(p, r)
            if not fn & 1:
                while not fn & 1 and fn != 0:
                    fn >>= 1
                    sn >>= 1
        else:
            r = node_hash(r, p)
        fn >>= 1
        sn >>= 1
    if sn != 0:
        raise VerificationError("the inclusion path is shorter than the tree needs")
    if r != root:
        raise VerificationError("the inclusion path does not lead to the checkpoint's root")


def verify_consistency(first: int, second: int, path: Sequence[bytes], first_root: bytes,
                       second_root: bytes) -> None:
    """RFC 9162 section 2.1.4.2, step by step; raises :class:`VerificationError`.

    A proof between equal sizes is empty and holds when the two roots are equal.
    """
    if not 1 <= first <= second:
        raise VerificationError(f"sizes {first} and {second} are not 1 <= first <= second")
    if first == second:
        if path:
            raise VerificationError("a proof between equal sizes must be empty")
        if first_root != second_root:
            raise VerificationError("two trees of the same size have different roots")
        return
    if not path:
        raise VerificationError("the consistency path is empty")
    path = list(path)
    if first & (first - 1) == 0:
        path.insert(0, first_root)
    fn, sn = first - 1, second - 1
    while fn & 1:
        fn >>= 1
        sn >>= 1
    fr = sr = path[0]
    for c in path[1:]:
        if sn == 0:
            raise VerificationError("the consistency path is longer than the trees allow")
        if fn & 1 or fn == sn:
            fr = node_hash(c, fr)
            sr = node_hash(c, sr)
            if not fn & 1:
                while not fn & 1 and fn != 0:
                    fn >>= 1
                    sn >>= 1
        else:
            sr = node_hash(sr, c)
        fn >>= 1
        sn >>= 1
    if sn != 0:
        raise VerificationError("the consistency path is shorter than the trees need")
    if fr != first_root:
        raise VerificationError("the consistency path does not lead to the older root")
    if sr != second_root:
        raise VerificationError("the consistency path does not lead to the newer root")


# -- proofs as files -------------------------------------------------------------------------


@dataclass(frozen=True)
class InclusionProof:
    leaf_index: int
    tree_size: int
    path: tuple

    @staticmethod
    def parse(obj: Union[str, bytes, dict]) -> "InclusionProof":
        d = _object(obj, INCLUSION_KEYS, "inclusion proof")
        return InclusionProof(
            _size(d["leaf_index"], "leaf_index", 0),
            _size(d["tree_size"], "tree_size", 1),
            tuple(_hashes(d["inclusion_path"], "inclusion_path")),
        )


@dataclass(frozen=True)
class ConsistencyProof:
    first_size: int
    second_size: int
    path: tuple

    @staticmethod
    def parse(obj: Union[str, bytes, dict]) -> "ConsistencyProof":
        d = _object(obj, CONSISTENCY_KEYS, "consistency proof")
        return ConsistencyProof(
            _size(d["first_size"], "first_size", 1),
            _size(d["second_size"], "second_size", 1),
            tuple(_hashes(d["consistency_path"], "consistency_path")),
        )


def _object(obj: Union[str, bytes, dict], keys: frozenset, what: str) -> dict:
    if isinstance(obj, (str, bytes)):
        try:
            obj = json.loads(obj)
        except ValueError as e:
            raise VerificationError(f"the {what} is not JSON: {e}") from None
    if not isinstance(obj, dict):
        raise VerificationError(f"the {what} is not a JSON object")
    if set(obj) != keys:
        raise VerificationError(
            f"the {what} must have exactly the keys {sorted(keys)}, it has {sorted(obj)}")
    return obj


def _size(v: Any, name: str, least: int) -> int:
    if isinstance(v, bool) or not isinstance(v, int) or v < least:
        raise VerificationError(f"{name} must be an integer >= {least}, it is {v!r}")
    return v


def _hex32(v: Any, name: str) -> bytes:
    if not isinstance(v, str) or len(v) != 64 or v != v.lower():
        raise VerificationError(f"{name} must be 64 lowercase hex digits")
    try:
        return bytes.fromhex(v)
    except ValueError:
        raise VerificationError(f"{name} must be 64 lowercase hex digits") from None


def _hashes(v: Any, name: str) -> List[bytes]:
    if not isinstance(v, list):
        raise VerificationError(f"{name} must be a list of hex hashes")
    return [_hex32(h, f"{name}[{i}]") for i, h in enumerate(v)]


# -- signed-note checkpoints and verifier keys -----------------------------------------------


@dataclass(frozen=True)
class VerifierKey:
    name: str
    key_id: bytes
    public_key: bytes

    @staticmethod
    def parse(text: str) -> "VerifierKey":
        """``NAME+KEYID_HEX+BASE64(0x01 || key)``, or 64 hex digits of a raw Ed25519 key."""
        text = text.strip()
        if len(text) == 64 and all(c in "0123456789abcdef" for c in text):
            raw = bytes.fromhex(text)
            return VerifierKey(KEY_NAME, _key_id(KEY_NAME, raw), raw)
        parts = text.split("+", 2)  # the base64 part may itself hold "+"
        if len(parts) != 3:
            raise VerificationError("a verifier key is NAME+KEYID+BASE64 (or 64 hex digits)")
        name, kid_hex, b64 = parts
        try:
            kid = bytes.fromhex(kid_hex)
            blob = base64.b64decode(b64, validate=True)
        except (ValueError, binascii.Error):
            raise VerificationError("the verifier key's id or key is not hex/base64") from None
        if len(kid) != 4 or len(blob) != 33 or blob[0] != 1:
            raise VerificationError("the verifier key is not a 4-byte id and an Ed25519 key")
        raw = blob[1:]
        if _key_id(name, raw) != kid:
            raise VerificationError("the verifier key's id does not match its name and key")
        return VerifierKey(name, kid, raw)


def _key_id(name: str, raw: bytes) -> bytes:
    return _sha256(name.encode() + b"\n" + b"\x01" + raw)[:4]


@dataclass(frozen=True)
class Checkpoint:
    chain: str
    tree_size: int
    root: bytes
    time: str
    users_size: Optional[int]
    users_root: Optional[bytes]
    body: bytes
    signatures: tuple  # (name, key id, signature)

    @staticmethod
    def parse(text: Union[str, bytes]) -> "Checkpoint":
        if isinstance(text, bytes):
            try:
                text = text.decode("utf-8")
            except UnicodeDecodeError:
                raise VerificationError("the checkpoint is not UTF-8") from None
        if text.lstrip().startswith("{"):
            raise VerificationError(
                "this is an older JSON checkpoint (format /1 or /2): it signs a chain head, "
                "not a tree; check it with `holdout audit --checkpoint` and an export")
        body, sep, sigs = text.partition("\n\n")
        if not sep:
            raise VerificationError("the checkpoint has no blank line before its signature")
        body += "\n"
        lines = body[:-1].split("\n")
        if len(lines) < 4:
            raise VerificationError("the checkpoint body needs origin, size, root and time")
        origin, size_s, root_b64 = lines[0], lines[1], lines[2]
        if not origin.startswith(ORIGIN_PREFIX) or len(origin) == len(ORIGIN_PREFIX):
            raise VerificationError(f"the origin line {origin!r} is not holdout-ledger/CHAIN")
        if not size_s.isdigit() or (size_s != "0" and size_s.startswith("0")):
            raise VerificationError(f"the tree size {size_s!r} is not a decimal number")
        root = _b64_32(root_b64, "root hash")
        time, users_size, users_root = None, None, None
        for extra in lines[3:]:
            words = extra.split(" ")
            if words[0] == "time" and len(words) == 2 and time is None:
                time = words[1]
            elif words[0] == "users" and len(words) == 3 and users_size is None:
                if not words[1].isdigit():
                    raise VerificationError("the users line's size is not a number")
                users_size, users_root = int(words[1]), _b64_32(words[2], "users root")
            else:
                raise VerificationError(f"unexpected checkpoint line {extra!r}")
        if time is None:
            raise VerificationError("the checkpoint has no time line")
        signatures = []
        for line in sigs.split("\n"):
            if line == "":
                continue
            if not line.startswith(SIGNATURE_PREFIX):
                raise VerificationError(f"signature line {line!r} does not start with an em dash")
            name, _, b64 = line[len(SIGNATURE_PREFIX):].rpartition(" ")
            try:
                blob = base64.b64decode(b64, validate=True)
            except (ValueError, binascii.Error):
                raise VerificationError("a signature is not base64") from None
            if len(blob) != 68:
                raise VerificationError("a signature must be a 4-byte key id and 64 bytes")
            signatures.append((name, blob[:4], blob[4:]))
        if not signatures:
            raise VerificationError("the checkpoint carries no signature")
        return Checkpoint(origin[len(ORIGIN_PREFIX):], int(size_s), root, time, users_size,
                          users_root, body.encode(), tuple(signatures))

    def verify(self, key: VerifierKey) -> None:
        """Checks the signature made with ``key``; raises :class:`VerificationError`."""
        try:
            from cryptography.exceptions import InvalidSignature
            from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
        except ImportError:  # pragma: no cover - depends on the environment
            raise VerificationError(
                "checking signatures needs the `cryptography` package "
                "(pip install 'holdout-ledger-client[verify]')") from None
        mine = [s for s in self.signatures if s[0] == key.name and s[1] == key.key_id]
        if not mine:
            raise VerificationError(
                f"the checkpoint has no signature by the key {key.name}+{key.key_id.hex()}")
        pk = Ed25519PublicKey.from_public_bytes(key.public_key)
        for _, _, sig in mine:
            try:
                pk.verify(sig, self.body)
                return
            except InvalidSignature:
                pass
        raise VerificationError("the checkpoint's signature does not match its text and the key")


def _b64_32(s: str, what: str) -> bytes:
    try:
        raw = base64.b64decode(s, validate=True)
    except (ValueError, binascii.Error):
        raise VerificationError(f"the {what} is not base64") from None
    if len(raw) != 32:
        raise VerificationError(f"the {what} is not 32 bytes")
    return raw


# -- what a team or an auditor checks --------------------------------------------------------


def verify_receipt(receipt: Union[dict, Any], proof: Union[str, dict, InclusionProof],
                   checkpoint: Union[str, bytes, Checkpoint], key: Union[str, VerifierKey]) -> dict:
    """Checks that the entry a receipt names is in the tree a signed checkpoint commits to.

    ``receipt`` is a dict (or an object) with ``holdout`` and ``entry_hash``. Returns a summary
    ``{"holdout", "entry_hash", "leaf_index", "tree_size", "time"}``; raises
    :class:`VerificationError` naming what failed.
    """
    holdout = _field(receipt, "holdout")
    entry_hash = _field(receipt, "entry_hash")
    p = proof if isinstance(proof, InclusionProof) else InclusionProof.parse(proof)
    cp = checkpoint if isinstance(checkpoint, Checkpoint) else Checkpoint.parse(checkpoint)
    k = key if isinstance(key, VerifierKey) else VerifierKey.parse(key)
    cp.verify(k)
    if cp.chain != holdout:
        raise VerificationError(
            f"the receipt is for holdout {holdout!r}, the checkpoint for {cp.chain!r}")
    if p.tree_size != cp.tree_size:
        raise VerificationError(
            f"the proof is for a tree of {p.tree_size}, the checkpoint signs {cp.tree_size}")
    verify_inclusion(entry_leaf_hash(entry_hash), p.leaf_index, p.tree_size, p.path, cp.root)
    return {"holdout": holdout, "entry_hash": entry_hash, "leaf_index": p.leaf_index,
            "tree_size": p.tree_size, "time": cp.time}


def verify_checkpoints(old: Union[str, bytes, Checkpoint], new: Union[str, bytes, Checkpoint],
                       proof: Union[str, dict, ConsistencyProof],
                       key: Union[str, VerifierKey]) -> dict:
    """Checks that a later signed checkpoint extends an earlier one of the same chain."""
    k = key if isinstance(key, VerifierKey) else VerifierKey.parse(key)
    a = old if isinstance(old, Checkpoint) else Checkpoint.parse(old)
    b = new if isinstance(new, Checkpoint) else Checkpoint.parse(new)
    p = proof if isinstance(proof, ConsistencyProof) else ConsistencyProof.parse(proof)
    a.verify(k)
    b.verify(k)
    if a.chain != b.chain:
        raise VerificationError(f"the checkpoints are of {a.chain!r} and {b.chain!r}")
    if (p.first_size, p.second_size) != (a.tree_size, b.tree_size):
        raise VerificationError(
            f"the proof is from {p.first_size} to {p.second_size}, the checkpoints sign "
            f"{a.tree_size} and {b.tree_size}")
    verify_consistency(p.first_size, p.second_size, p.path, a.root, b.root)
    return {"chain": a.chain, "first_size": a.tree_size, "second_size": b.tree_size}


def entry_hash(entry: dict) -> str:
    """The hash of an exported entry written with encoding ``holdout-ledger-entry/2``.

    ``entry`` has ``chain``, ``seq``, ``kind``, ``salt``, ``prev_hash`` and ``body`` (a JSON
    object, or its text). Uses the ``rfc8785`` package for the canonical JSON, so this check does
    not share code with the daemon.
    """
    try:
        import rfc8785
    except ImportError:  # pragma: no cover - depends on the environment
        raise VerificationError(
            "entry hashes need the `rfc8785` package "
            "(pip install 'holdout-ledger-client[verify]')") from None
    body = entry["body"]
    if isinstance(body, str):
        body = json.loads(body)
    obj = {"encoding": ENCODING_V2, "chain": entry["chain"], "seq": entry["seq"],
           "kind": entry["kind"], "salt": entry["salt"], "prev": entry["prev_hash"],
           "body": body}
    return hashlib.sha256(rfc8785.dumps(obj)).hexdigest()


def leaves_root(entry_hashes: Iterable[str]) -> bytes:
    """The tree root over a chain's entry hashes, in entry order (for auditors with an export)."""
    return tree_hash([_hex32(h, "entry hash") for h in entry_hashes])


def _field(obj: Any, name: str) -> str:
    v = obj.get(name) if isinstance(obj, dict) else getattr(obj, name, None)
    if not isinstance(v, str) or not v:
        raise VerificationError(f"the receipt has no {name}")
    return v


# -- command line ----------------------------------------------------------------------------


def _read(path: str) -> str:
    try:
        return Path(path).read_text(encoding="utf-8")
    except OSError as e:
        raise VerificationError(f"cannot read {path}: {e.strerror}") from None


def _receipt_from(text: str) -> dict:
    try:
        obj = json.loads(text)
    except ValueError as e:
        raise VerificationError(f"the receipt is not JSON: {e}") from None
    # A whole `holdout submit --json` answer carries its receipt inside.
    if isinstance(obj, dict) and isinstance(obj.get("receipt"), dict):
        obj = obj["receipt"]
    if not isinstance(obj, dict):
        raise VerificationError("the receipt is not a JSON object")
    return obj


def main(argv: Optional[Sequence[str]] = None) -> int:
    ap = argparse.ArgumentParser(
        prog="python -m holdout_ledger.verify",
        description="Verify holdout-ledger receipts and checkpoints offline (no daemon).")
    sub = ap.add_subparsers(dest="what", required=True)
    r = sub.add_parser("receipt", help="an entry named by a receipt is in a signed tree")
    r.add_argument("--receipt", required=True, help="receipt JSON (or a submit --json answer)")
    r.add_argument("--proof", required=True, help="inclusion proof JSON")
    r.add_argument("--checkpoint", required=True, help="signed checkpoint (note text)")
    r.add_argument("--key", required=True, help="verifier key, or a file holding it")
    c = sub.add_parser("consistency", help="a later checkpoint extends an earlier one")
    c.add_argument("--proof", required=True, help="consistency proof JSON")
    c.add_argument("--old", required=True, help="the earlier signed checkpoint")
    c.add_argument("--new", required=True, help="the later signed checkpoint")
    c.add_argument("--key", required=True, help="verifier key, or a file holding it")
    ap.add_argument("--json", action="store_true", help="print the result as JSON")
    args = ap.parse_args(argv)
    try:
        key = args.key if "+" in args.key or len(args.key) == 64 else _read(args.key)
        if args.what == "receipt":
            out = verify_receipt(_receipt_from(_read(args.receipt)), _read(args.proof),
                                 _read(args.checkpoint), key)
            text = (f"verified: entry {out['entry_hash'][:16]}... of {out['holdout']} is leaf "
                    f"{out['leaf_index']} of the tree of {out['tree_size']} signed at "
                    f"{out['time']}")
        else:
            out = verify_checkpoints(_read(args.old), _read(args.new), _read(args.proof), key)
            text = (f"verified: the tree of {out['second_size']} of {out['chain']} extends the "
                    f"tree of {out['first_size']}")
    except VerificationError as e:
        print(json.dumps({"verified": False, "error": str(e)}) if args.json
              else f"not verified: {e}", file=sys.stdout if args.json else sys.stderr)
        return 1
    print(json.dumps({"verified": True, **out}) if args.json else text)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
