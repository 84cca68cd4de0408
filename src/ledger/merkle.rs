//! The Merkle tree of a chain (RFC 9162 section 2.1): tree hash, inclusion and consistency
//! proofs and their verification, and the stored perfect subtrees that let the daemon prove
//! against a chain of any length without rehashing it.
//!
//! Leaf `i` is entry `i` of the chain; its input is the 32 raw bytes of the entry's hash (for
//! every entry encoding), so a receipt, which names the hash, is enough to form the leaf.
//!
//! Proofs are generated with the recursive definitions of RFC 9162 sections 2.1.3.1 and
//! 2.1.4.1 over [`Nodes`], a source of perfect-subtree hashes; they are verified with the
//! iterative algorithms of sections 2.1.3.2 and 2.1.4.2, which share no code with generation.
//! Every subtree the recursion names starts at a multiple of the largest power of two not above
//! its size, so it is a perfect subtree or the right edge, which splits into O(log n) perfect
//! ones: a proof costs O(log^2 n) stored-node reads at worst, whatever the chain's length.

use rusqlite::{Connection, OptionalExtension, params};
use sha2::{Digest, Sha256};

use crate::error::{Error, Result};

/// A SHA-256 hash.
pub type Hash = [u8; 32];

/// MTH of the empty list: SHA-256 of no bytes.
pub fn empty_root() -> Hash {
    Sha256::digest([]).into()
}

/// Leaf hash: SHA-256(0x00 || d).
pub fn leaf_hash(d: &[u8]) -> Hash {
    let mut h = Sha256::new();
    h.update([0u8]);
    h.update(d);
    h.finalize().into()
}

/// Interior node hash: SHA-256(0x01 || left || right).
pub fn node_hash(left: &Hash, right: &Hash) -> Hash {
    let mut h = Sha256::new();
    h.update([1u8]);
    h.update(left);
    h.update(right);
    h.finalize().into()
}

/// The leaf input of an entry: its hex hash decoded to 32 bytes.
pub fn leaf_input(entry_hash_hex: &str) -> Result<Hash> {
    hex::decode(entry_hash_hex)
        .ok()
        .and_then(|b| b.try_into().ok())
        .ok_or_else(|| {
            Error::invalid(
                "entry hash",
                format!("{entry_hash_hex:?} is not 32 hex bytes"),
            )
        })
}

/// The largest power of two strictly below `n` (n >= 2).
fn split(n: u64) -> u64 {
    debug_assert!(n >= 2);
    1u64 << (63 - (n - 1).leading_zeros())
}

/// A source of the hashes of perfect subtrees: `perfect(level, index)` is MTH of leaves
/// `index * 2^level .. (index + 1) * 2^level`.
pub trait Nodes {
    /// The hash of the perfect subtree at `level`, `index`.
    fn perfect(&self, level: u32, index: u64) -> Result<Hash>;
}

/// `MTH(D[start:end])` for a subtree the RFC 9162 recursion names (start aligned as described
/// in the module documentation).
pub fn subtree(nodes: &impl Nodes, start: u64, end: u64) -> Result<Hash> {
    let size = end - start;
    if size == 0 {
        return Ok(empty_root());
    }
    if size.is_power_of_two() && start.is_multiple_of(size) {
        return nodes.perfect(size.trailing_zeros(), start >> size.trailing_zeros());
    }
    let k = split(size);
    Ok(node_hash(
        &subtree(nodes, start, start + k)?,
        &subtree(nodes, start + k, end)?,
    ))
}

/// The root of the first `size` leaves.
pub fn root(nodes: &impl Nodes, size: u64) -> Result<Hash> {
    subtree(nodes, 0, size)
}

/// Inclusion proof of leaf `index` in the tree of the first `size` leaves (RFC 9162 2.1.3.1),
/// nearest the leaf first.
pub fn inclusion_proof(nodes: &impl Nodes, index: u64, size: u64) -> Result<Vec<Hash>> {
    if index >= size {
        return Err(Error::invalid(
            "leaf_index",
            format!("{index} is not below the tree size {size}"),
        ));
    }
    fn path(n: &impl Nodes, m: u64, start: u64, end: u64, out: &mut Vec<Hash>) -> Result<()> {
        if end - start == 1 {
            return Ok(());
        }
        let k = split(end - start);
        if m < start + k {
            path(n, m, start, start + k, out)?;
            out.push(subtree(n, start + k, end)?);
        } else {
            path(n, m, start + k, end, out)?;
            out.push(subtree(n, start, start + k)?);
        }
        Ok(())
    }
    let mut out = Vec::new();
    path(nodes, index, 0, size, &mut out)?;
    Ok(out)
}

/// Consistency proof from the tree of the first `first` leaves to that of the first `second`
/// (RFC 9162 2.1.4.1), 1 <= first <= second; empty when they are equal.
pub fn consistency_proof(nodes: &impl Nodes, first: u64, second: u64) -> Result<Vec<Hash>> {
    if first == 0 || first > second {
        return Err(Error::invalid(
            "first_size",
            format!("{first} must be at least 1 and at most the tree size {second}"),
        ));
    }
    fn sub(
        n: &impl Nodes,
        m: u64,
        start: u64,
        end: u64,
        whole: bool,
        out: &mut Vec<Hash>,
    ) -> Result<()> {
        if m == end - start {
            if !whole {
                out.push(subtree(n, start, end)?);
            }
            return Ok(());
        }
        let k = split(end - start);
        if m <= k {
            sub(n, m, start, start + k, whole, out)?;
            out.push(subtree(n, start + k, end)?);
        } else {
            sub(n, m - k, start + k, end, false, out)?;
            out.push(subtree(n, start, start + k)?);
        }
        Ok(())
    }
    let mut out = Vec::new();
    sub(nodes, first, 0, second, true, &mut out)?;
    Ok(out)
}

/// Verifies an inclusion proof (RFC 9162 2.1.3.2): `leaf` is the leaf input (the entry's 32
/// hash bytes). Returns why it fails.
pub fn verify_inclusion(
    leaf: &Hash,
    index: u64,
    size: u64,
    path: &[Hash],
    root: &Hash,
) -> std::result::Result<(), String> {
    if index >= size {
        return Err(format!("leaf_index {index} is not below tree_size {size}"));
    }
    let (mut fnode, mut snode) = (index, size - 1);
    let mut r = leaf_hash(leaf);
    for p in path {
        if snode == 0 {
            return Err("the inclusion path is longer than the tree is deep".into());
        }
        if fnode & 1 == 1 || fnode == snode {
            r = node_hash(p, &r);
            if fnode & 1 == 0 {
                while fnode & 1 == 0 && fnode != 0 {
                    fnode >>= 1;
                    snode >>= 1;
                }
            }
        } else {
            r = node_hash(&r, p);
        }
        fnode >>= 1;
        snode >>= 1;
    }
    if snode != 0 {
        return Err("the inclusion path is shorter than the tree is deep".into());
    }
    if r != *root {
        return Err(
            "the root computed from the entry hash and the inclusion path is not the \
             checkpoint's root"
                .into(),
        );
    }
    Ok(())
}

/// Verifies a consistency proof (RFC 9162 2.1.4.2) from (`first`, `first_root`) to
/// (`second`, `second_root`). Returns why it fails.
pub fn verify_consistency(
    first: u64,
    second: u64,
    path: &[Hash],
    first_root: &Hash,
    second_root: &Hash,
) -> std::result::Result<(), String> {
    if first == 0 || first > second {
        return Err(format!(
            "first_size {first} must be at least 1 and at most second_size {second}"
        ));
    }
    if first == second {
        if !path.is_empty() {
            return Err("a proof between equal sizes must be empty".into());
        }
        if first_root != second_root {
            return Err("the two checkpoints have the same size but different roots".into());
        }
        return Ok(());
    }
    if path.is_empty() {
        return Err("the consistency path is empty".into());
    }
    let mut path: Vec<Hash> = path.to_vec();
    if first.is_power_of_two() {
        path.insert(0, *first_root);
    }
    let (mut fnode, mut snode) = (first - 1, second - 1);
    while fnode & 1 == 1 {
        fnode >>= 1;
        snode >>= 1;
    }
    let (mut fr, mut sr) = (path[0], path[0]);
    for c in &path[1..] {
        if snode == 0 {
            return Err("the consistency path is longer than the tree is deep".into());
        }
        if fnode & 1 == 1 || fnode == snode {
            fr = node_hash(c, &fr);
            sr = node_hash(c, &sr);
            if fnode & 1 == 0 {
                while fnode & 1 == 0 && fnode != 0 {
                    fnode >>= 1;
                    snode >>= 1;
                }
            }
        } else {
            sr = node_hash(&sr, c);
        }
        fnode >>= 1;
        snode >>= 1;
    }
    if snode != 0 {
        return Err("the consistency path is shorter than the tree is deep".into());
    }
    if fr != *first_root {
        return Err("the path does not lead to the older checkpoint's root".into());
    }
    if sr != *second_root {
        return Err("the path does not lead to the newer checkpoint's root".into());
    }
    Ok(())
}

/// A whole tree in memory: every perfect subtree of the leaves given.
#[derive(Debug, Clone, Default)]
pub struct Tree {
    /// `levels[l][i]` = perfect subtree at level `l`, index `i`.
    levels: Vec<Vec<Hash>>,
}

impl Tree {
    /// The tree over these leaf inputs.
    pub fn new(leaves: impl IntoIterator<Item = Hash>) -> Tree {
        let mut t = Tree::default();
        for d in leaves {
            t.push(&d);
        }
        t
    }

    /// Appends a leaf input.
    pub fn push(&mut self, d: &Hash) {
        let mut h = leaf_hash(d);
        let mut level = 0;
        loop {
            if self.levels.len() == level {
                self.levels.push(Vec::new());
            }
            self.levels[level].push(h);
            let idx = self.levels[level].len() - 1;
            if idx.is_multiple_of(2) {
                break;
            }
            h = node_hash(&self.levels[level][idx - 1], &h);
            level += 1;
        }
    }

    /// Number of leaves.
    pub fn size(&self) -> u64 {
        self.levels.first().map_or(0, |l| l.len() as u64)
    }

    /// The root of the whole tree.
    pub fn root(&self) -> Hash {
        root(self, self.size()).expect("an in-memory tree holds every perfect subtree")
    }

    /// Every stored node as (level, index, hash).
    pub fn nodes(&self) -> impl Iterator<Item = (u32, u64, &Hash)> {
        self.levels.iter().enumerate().flat_map(|(l, hs)| {
            hs.iter()
                .enumerate()
                .map(move |(i, h)| (l as u32, i as u64, h))
        })
    }
}

impl Nodes for Tree {
    fn perfect(&self, level: u32, index: u64) -> Result<Hash> {
        self.levels
            .get(level as usize)
            .and_then(|l| l.get(index as usize))
            .copied()
            .ok_or_else(|| Error::Internal(format!("no tree node at level {level}, {index}")))
    }
}

/// The stored tree of one chain (table `merkle_nodes`, see `migrations/0008_merkle.sql`).
pub struct Stored<'a> {
    conn: &'a Connection,
    chain: &'a str,
}

impl<'a> Stored<'a> {
    /// The stored tree of `chain`, read through `conn` (inside a read transaction for a
    /// consistent view).
    pub fn new(conn: &'a Connection, chain: &'a str) -> Stored<'a> {
        Stored { conn, chain }
    }
}

impl Nodes for Stored<'_> {
    fn perfect(&self, level: u32, index: u64) -> Result<Hash> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT hash FROM merkle_nodes WHERE chain = ?1 AND level = ?2 AND idx = ?3",
        )?;
        let blob: Option<Vec<u8>> = stmt
            .query_row(params![self.chain, level, index as i64], |r| r.get(0))
            .optional()?;
        blob.and_then(|b| b.try_into().ok()).ok_or_else(|| {
            Error::Internal(format!(
                "the tree of {} has no node at level {level}, index {index}",
                self.chain
            ))
        })
    }
}

fn insert_node(tx: &Connection, chain: &str, level: u32, index: u64, hash: &Hash) -> Result<()> {
    let mut stmt = tx.prepare_cached(
        "INSERT INTO merkle_nodes (chain, level, idx, hash) VALUES (?1, ?2, ?3, ?4)",
    )?;
    stmt.execute(params![chain, level, index as i64, &hash[..]])?;
    Ok(())
}

/// Adds leaf `index` (the entry's hash bytes) to the stored tree of `chain` inside the
/// caller's transaction, with every perfect subtree it completes: one row, plus one more per
/// trailing 1 bit of `index` (two rows per entry on average). Called by `ledger::append` only.
pub(crate) fn append_leaf(tx: &Connection, chain: &str, index: u64, leaf: &Hash) -> Result<()> {
    let mut h = leaf_hash(leaf);
    insert_node(tx, chain, 0, index, &h)?;
    let (mut level, mut idx) = (0u32, index);
    let stored = Stored::new(tx, chain);
    while idx & 1 == 1 {
        let left = stored.perfect(level, idx - 1)?;
        h = node_hash(&left, &h);
        level += 1;
        idx >>= 1;
        insert_node(tx, chain, level, idx, &h)?;
    }
    Ok(())
}

/// Builds the stored tree of every chain from its entries' hashes (migration 0008, for
/// ledgers written before trees existed). Chains that already have nodes are left alone.
pub(crate) fn build_all(tx: &Connection) -> Result<()> {
    let chains: Vec<String> = {
        let mut stmt = tx.prepare(
            "SELECT DISTINCT chain FROM ledger
             WHERE chain NOT IN (SELECT chain FROM merkle_nodes) ORDER BY chain",
        )?;
        stmt.query_map([], |r| r.get(0))?
            .collect::<std::result::Result<_, _>>()?
    };
    for chain in chains {
        let mut stmt = tx.prepare("SELECT hash FROM ledger WHERE chain = ?1 ORDER BY seq")?;
        let hashes: Vec<String> = stmt
            .query_map([&chain], |r| r.get(0))?
            .collect::<std::result::Result<_, _>>()?;
        let mut tree = Tree::default();
        for h in &hashes {
            tree.push(&leaf_input(h)?);
        }
        for (level, index, hash) in tree.nodes() {
            insert_node(tx, &chain, level, index, hash)?;
        }
    }
    Ok(())
}

/// The number of entries (leaves) of `chain`.
pub fn size(conn: &Connection, chain: &str) -> Result<u64> {
    let n: i64 = conn.query_row(
        "SELECT count(*) FROM merkle_nodes WHERE chain = ?1 AND level = 0",
        [chain],
        |r| r.get(0),
    )?;
    Ok(n as u64)
}

/// An inclusion proof as written to a file (merkle-format.md section 3): hashes, sizes and
/// indices only.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InclusionProof {
    /// The entry's number.
    pub leaf_index: u64,
    /// The tree size of the checkpoint it proves against.
    pub tree_size: u64,
    /// Hex hashes, nearest the leaf first.
    pub inclusion_path: Vec<String>,
}

/// A consistency proof as written to a file (merkle-format.md section 3).
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConsistencyProof {
    /// The older tree size.
    pub first_size: u64,
    /// The newer tree size.
    pub second_size: u64,
    /// Hex hashes.
    pub consistency_path: Vec<String>,
}

impl InclusionProof {
    /// The proof as a file holds it: one JSON object, these three keys only.
    pub fn text(&self) -> String {
        serde_json::to_string(self).expect("a proof always serialises")
    }

    /// Verifies this proof for the entry whose hash (hex) is `entry_hash` against a
    /// checkpoint's tree `size` and `root`. The proof's size must be the checkpoint's: the
    /// root authenticates the size only through the signed checkpoint.
    pub fn verify(
        &self,
        entry_hash: &str,
        size: u64,
        root: &Hash,
    ) -> std::result::Result<(), String> {
        if self.tree_size != size {
            return Err(format!(
                "the proof is for tree size {}, the checkpoint's tree has {size} entries",
                self.tree_size
            ));
        }
        let leaf = leaf_input(entry_hash).map_err(|e| e.to_string())?;
        let path = decode_path("inclusion_path", &self.inclusion_path)?;
        verify_inclusion(&leaf, self.leaf_index, self.tree_size, &path, root)
    }
}

impl ConsistencyProof {
    /// The proof as a file holds it: one JSON object, these three keys only.
    pub fn text(&self) -> String {
        serde_json::to_string(self).expect("a proof always serialises")
    }

    /// Verifies this proof from the tree (`first_size`, `first_root`) of an older checkpoint
    /// to the tree (`second_size`, `second_root`) of a newer one; the proof's sizes must be
    /// the checkpoints'.
    pub fn verify(
        &self,
        first_size: u64,
        first_root: &Hash,
        second_size: u64,
        second_root: &Hash,
    ) -> std::result::Result<(), String> {
        if (self.first_size, self.second_size) != (first_size, second_size) {
            return Err(format!(
                "the proof is from size {} to {}, the checkpoints have sizes {first_size} and \
                 {second_size}",
                self.first_size, self.second_size
            ));
        }
        let path = decode_path("consistency_path", &self.consistency_path)?;
        verify_consistency(first_size, second_size, &path, first_root, second_root)
    }
}

/// Decodes a list of hex hashes; errors name the field.
pub fn decode_path(field: &str, hexes: &[String]) -> std::result::Result<Vec<Hash>, String> {
    hexes
        .iter()
        .enumerate()
        .map(|(i, h)| {
            hex::decode(h)
                .ok()
                .and_then(|b| b.try_into().ok())
                .ok_or_else(|| format!("{field}[{i}] is not 32 hex bytes"))
        })
        .collect()
}

/// Encodes a list of hashes as hex.
pub fn encode_path(path: &[Hash]) -> Vec<String> {
    path.iter().map(hex::encode).collect()
}

/// Test vectors for independent implementations (merkle-format.md section 6): leaves
/// SHA-256("leaf {i}"), the root of every prefix, every inclusion proof and every consistency
/// proof up to `max_size` leaves, computed by the code the daemon uses.
pub fn vectors(max_size: u64) -> Result<serde_json::Value> {
    let leaves: Vec<Hash> = (0..max_size)
        .map(|i| Sha256::digest(format!("leaf {i}").as_bytes()).into())
        .collect();
    let tree = Tree::new(leaves.iter().copied());
    let mut roots = Vec::new();
    let mut inclusion = Vec::new();
    let mut consistency = Vec::new();
    for n in 1..=max_size {
        roots.push(hex::encode(root(&tree, n)?));
        for i in 0..n {
            inclusion.push(InclusionProof {
                leaf_index: i,
                tree_size: n,
                inclusion_path: encode_path(&inclusion_proof(&tree, i, n)?),
            });
        }
        for m in 1..=n {
            consistency.push(ConsistencyProof {
                first_size: m,
                second_size: n,
                consistency_path: encode_path(&consistency_proof(&tree, m, n)?),
            });
        }
    }
    Ok(serde_json::json!({
        "leaves": leaves.iter().map(hex::encode).collect::<Vec<_>>(),
        "roots": roots,
        "inclusion": inclusion,
        "consistency": consistency,
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// MTH straight from RFC 9162 2.1.1, written apart from the code under test.
    fn naive_mth(d: &[Hash]) -> Hash {
        match d.len() {
            0 => Sha256::digest([]).into(),
            1 => {
                let mut v = vec![0u8];
                v.extend_from_slice(&d[0]);
                Sha256::digest(&v).into()
            }
            n => {
                let mut k = 1;
                while k * 2 < n {
                    k *= 2;
                }
                let mut v = vec![1u8];
                v.extend_from_slice(&naive_mth(&d[..k]));
                v.extend_from_slice(&naive_mth(&d[k..]));
                Sha256::digest(&v).into()
            }
        }
    }

    /// PATH from RFC 9162 2.1.3.1 over naive MTH.
    fn naive_path(m: usize, d: &[Hash]) -> Vec<Hash> {
        let n = d.len();
        if n <= 1 {
            return vec![];
        }
        let mut k = 1;
        while k * 2 < n {
            k *= 2;
        }
        if m < k {
            let mut p = naive_path(m, &d[..k]);
            p.push(naive_mth(&d[k..]));
            p
        } else {
            let mut p = naive_path(m - k, &d[k..]);
            p.push(naive_mth(&d[..k]));
            p
        }
    }

    /// SUBPROOF from RFC 9162 2.1.4.1 over naive MTH.
    fn naive_subproof(m: usize, d: &[Hash], b: bool) -> Vec<Hash> {
        let n = d.len();
        if m == n {
            return if b { vec![] } else { vec![naive_mth(d)] };
        }
        let mut k = 1;
        while k * 2 < n {
            k *= 2;
        }
        if m <= k {
            let mut p = naive_subproof(m, &d[..k], b);
            p.push(naive_mth(&d[k..]));
            p
        } else {
            let mut p = naive_subproof(m - k, &d[k..], false);
            p.push(naive_mth(&d[..k]));
            p
        }
    }

    fn leaves(n: usize) -> Vec<Hash> {
        (0..n)
            .map(|i| Sha256::digest(format!("leaf {i}").as_bytes()).into())
            .collect()
    }

    fn flips(h: &Hash) -> impl Iterator<Item = Hash> + '_ {
        (0..256).map(move |bit| {
            let mut x = *h;
            x[bit / 8] ^= 1 << (bit % 8);
            x
        })
    }

    #[test]
    fn empty_and_single_roots_match_the_definition() {
        // SHA-256 of no bytes (FIPS 180-4 / common practice).
        assert_eq!(
            hex::encode(empty_root()),
            "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
        );
        assert_eq!(Tree::default().root(), empty_root());
        let d = leaves(1);
        assert_eq!(Tree::new(d.clone()).root(), naive_mth(&d));
    }

    #[test]
    fn roots_and_inclusion_proofs_match_the_naive_definition_for_sizes_1_to_64() {
        let d = leaves(64);
        let tree = Tree::new(d.iter().copied());
        for n in 1..=64usize {
            let want_root = naive_mth(&d[..n]);
            assert_eq!(root(&tree, n as u64).unwrap(), want_root, "root of {n}");
            assert_eq!(Tree::new(d[..n].iter().copied()).root(), want_root);
            for i in 0..n {
                let path = inclusion_proof(&tree, i as u64, n as u64).unwrap();
                assert_eq!(path, naive_path(i, &d[..n]), "path {i} of {n}");
                verify_inclusion(&d[i], i as u64, n as u64, &path, &want_root)
                    .unwrap_or_else(|e| panic!("{i} of {n}: {e}"));
            }
        }
    }

    #[test]
    fn consistency_proofs_match_the_naive_definition_for_every_pair_up_to_64() {
        let d = leaves(64);
        let tree = Tree::new(d.iter().copied());
        for n in 1..=64usize {
            let second = naive_mth(&d[..n]);
            for m in 1..=n {
                let path = consistency_proof(&tree, m as u64, n as u64).unwrap();
                assert_eq!(path, naive_subproof(m, &d[..n], true), "{m} -> {n}");
                let first = naive_mth(&d[..m]);
                verify_consistency(m as u64, n as u64, &path, &first, &second)
                    .unwrap_or_else(|e| panic!("{m} -> {n}: {e}"));
            }
        }
    }

    #[test]
    fn every_one_bit_flip_and_every_off_by_one_fails_inclusion() {
        let d = leaves(64);
        let tree = Tree::new(d.iter().copied());
        for n in 1..=64u64 {
            let r = root(&tree, n).unwrap();
            for i in 0..n {
                let leaf = &d[i as usize];
                let path = inclusion_proof(&tree, i, n).unwrap();
                for (j, h) in path.iter().enumerate() {
                    for x in flips(h) {
                        let mut p = path.clone();
                        p[j] = x;
                        assert!(verify_inclusion(leaf, i, n, &p, &r).is_err());
                    }
                }
                for x in flips(leaf) {
                    assert!(verify_inclusion(&x, i, n, &path, &r).is_err());
                }
                for x in flips(&r) {
                    assert!(verify_inclusion(leaf, i, n, &path, &x).is_err());
                }
                // Index and size off by one, in the proof as a file states them: the size is
                // checked against the checkpoint's, the index by the path.
                let file = InclusionProof {
                    leaf_index: i,
                    tree_size: n,
                    inclusion_path: encode_path(&path),
                };
                let hex_leaf = hex::encode(leaf);
                assert_eq!(file.verify(&hex_leaf, n, &r), Ok(()));
                for (ii, nn) in [(i + 1, n), (i.wrapping_sub(1), n), (i, n + 1), (i, n - 1)] {
                    let moved = InclusionProof {
                        leaf_index: ii,
                        tree_size: nn,
                        ..file.clone()
                    };
                    assert!(
                        moved.verify(&hex_leaf, n, &r).is_err(),
                        "{i} of {n} accepted as {ii} of {nn}"
                    );
                }
                if !path.is_empty() {
                    assert!(verify_inclusion(leaf, i, n, &path[1..], &r).is_err());
                }
                let mut longer = path.clone();
                longer.push(r);
                assert!(verify_inclusion(leaf, i, n, &longer, &r).is_err());
            }
        }
    }

    #[test]
    fn every_one_bit_flip_and_every_off_by_one_fails_consistency() {
        let d = leaves(64);
        let tree = Tree::new(d.iter().copied());
        for n in 1..=64u64 {
            let second = root(&tree, n).unwrap();
            for m in 1..=n {
                let first = root(&tree, m).unwrap();
                let path = consistency_proof(&tree, m, n).unwrap();
                for (j, h) in path.iter().enumerate() {
                    for x in flips(h) {
                        let mut p = path.clone();
                        p[j] = x;
                        assert!(verify_consistency(m, n, &p, &first, &second).is_err());
                    }
                }
                for x in flips(&first).step_by(7) {
                    assert!(verify_consistency(m, n, &path, &x, &second).is_err());
                }
                for x in flips(&second).step_by(7) {
                    assert!(verify_consistency(m, n, &path, &first, &x).is_err());
                }
                let file = ConsistencyProof {
                    first_size: m,
                    second_size: n,
                    consistency_path: encode_path(&path),
                };
                assert_eq!(file.verify(m, &first, n, &second), Ok(()));
                for (mm, nn) in [(m + 1, n), (m - 1, n), (m, n + 1), (m, n - 1)] {
                    let moved = ConsistencyProof {
                        first_size: mm,
                        second_size: nn,
                        ..file.clone()
                    };
                    assert!(
                        moved.verify(m, &first, n, &second).is_err(),
                        "{m} -> {n} accepted as {mm} -> {nn}"
                    );
                    // Nor does the path prove the sizes it was not made for.
                    if (mm, nn) != (m, n) && mm >= 1 && mm <= nn && nn >= 1 {
                        let r1 = if mm <= 64 {
                            root(&tree, mm).unwrap()
                        } else {
                            first
                        };
                        let r2 = if nn <= 64 {
                            root(&tree, nn).unwrap()
                        } else {
                            second
                        };
                        if (r1, r2) != (first, second) {
                            assert!(verify_consistency(mm, nn, &path, &r1, &r2).is_err());
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn the_stored_tree_matches_the_in_memory_one() -> Result<()> {
        let mut conn = Connection::open_in_memory()?;
        crate::store::migrate(&mut conn)?;
        let d = leaves(37);
        let tx = conn.transaction()?;
        for (i, x) in d.iter().enumerate() {
            append_leaf(&tx, "h", i as u64, x)?;
        }
        tx.commit()?;
        let stored = Stored::new(&conn, "h");
        let tree = Tree::new(d.iter().copied());
        assert_eq!(size(&conn, "h")?, 37);
        for n in 1..=37u64 {
            assert_eq!(root(&stored, n)?, naive_mth(&d[..n as usize]));
            for i in 0..n {
                assert_eq!(
                    inclusion_proof(&stored, i, n)?,
                    inclusion_proof(&tree, i, n)?
                );
            }
            for m in 1..=n {
                assert_eq!(
                    consistency_proof(&stored, m, n)?,
                    consistency_proof(&tree, m, n)?
                );
            }
        }
        // Two rows per leaf at most: 37 leaves complete 18 + 9 + 4 + 2 + 1 pairs.
        let rows: i64 = conn.query_row("SELECT count(*) FROM merkle_nodes", [], |r| r.get(0))?;
        assert_eq!(rows, 37 + 18 + 9 + 4 + 2 + 1);
        Ok(())
    }

    #[test]
    fn vectors_have_every_proof() -> Result<()> {
        let v = vectors(5)?;
        assert_eq!(v["leaves"].as_array().unwrap().len(), 5);
        assert_eq!(v["roots"].as_array().unwrap().len(), 5);
        assert_eq!(v["inclusion"].as_array().unwrap().len(), 15);
        assert_eq!(v["consistency"].as_array().unwrap().len(), 15);
        Ok(())
    }

    /// Figures for a 1,000,000-entry chain, run once by hand (not a timed test):
    /// `cargo test --lib -- --ignored --nocapture measure_a_million_entry_chain`.
    /// Appends go through `ledger::append` into a file database (WAL), 1,000 per transaction;
    /// the tree's share is `append_leaf` alone for another 1,000,000 leaves the same way.
    #[test]
    #[ignore = "measurement, run by hand; prints figures"]
    fn measure_a_million_entry_chain() -> Result<()> {
        use std::time::Instant;
        const N: u64 = 1_000_000;
        const BATCH: u64 = 1_000;
        let dir = tempfile::tempdir().map_err(|e| Error::Internal(e.to_string()))?;
        let mut store = crate::store::Store::open(&dir.path().join("m.db"))?;
        let body = serde_json::json!({"query": 12, "team": "blue", "target": "defect",
            "exact": 0.123456789, "interval": [0.1, 0.15], "budget": {"spent": 0.01}});
        let t = Instant::now();
        for b in 0..N / BATCH {
            let tx = store.conn().transaction()?;
            for i in 0..BATCH {
                let kind = if b == 0 && i == 0 {
                    crate::ledger::Kind::Genesis
                } else {
                    crate::ledger::Kind::Answer
                };
                crate::ledger::append(&tx, "big", kind, &body)?;
            }
            tx.commit()?;
        }
        let append_s = t.elapsed().as_secs_f64();
        // Before: 0.4.0's append, as it was (encoding /1, no tree), into another chain.
        let t = Instant::now();
        for b in 0..N / BATCH {
            let tx = store.conn().transaction()?;
            for i in 0..BATCH {
                let kind = if b == 0 && i == 0 {
                    "genesis"
                } else {
                    "answer"
                };
                let (seq, prev) = match crate::ledger::head(&tx, "before")? {
                    Some((seq, hash)) => (seq + 1, hash),
                    None => (0, crate::ledger::ZERO_HASH.to_string()),
                };
                let salt = crate::ledger::fresh_salt()?;
                let text = crate::ledger::canonical_json(&body);
                let hash = crate::ledger::entry_hash_v1(&prev, seq, kind, &salt, &text);
                tx.execute(
                    "INSERT INTO ledger (chain, seq, kind, body, salt, prev_hash, hash)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
                    params!["before", seq as i64, kind, text, salt, prev, hash],
                )?;
            }
            tx.commit()?;
        }
        let before_s = t.elapsed().as_secs_f64();
        println!(
            "before (0.4.0's append: /1, no tree): {N} entries in {before_s:.1} s = {:.1} us/entry",
            before_s * 1e6 / N as f64
        );
        let leaves: Vec<Hash> = (0..N)
            .map(|i| Sha256::digest(format!("leaf {i}").as_bytes()).into())
            .collect();
        let t = Instant::now();
        for b in 0..N / BATCH {
            let tx = store.conn().transaction()?;
            for i in b * BATCH..(b + 1) * BATCH {
                append_leaf(&tx, "tree-only", i, &leaves[i as usize])?;
            }
            tx.commit()?;
        }
        let tree_s = t.elapsed().as_secs_f64();
        println!(
            "after (ledger::append: /2, tree): {N} entries in {append_s:.1} s = {:.1} us/entry, \
             {:.2}x before",
            append_s * 1e6 / N as f64,
            append_s / before_s
        );
        println!(
            "tree alone: {N} leaves in {tree_s:.1} s = {:.1} us/leaf = {:.0}% of an append",
            tree_s * 1e6 / N as f64,
            100.0 * tree_s / append_s
        );
        let conn = store.conn();
        let rows: i64 = conn.query_row(
            "SELECT count(*) FROM merkle_nodes WHERE chain = 'big'",
            [],
            |r| r.get(0),
        )?;
        println!("tree rows for {N} entries: {rows}");
        let t = Instant::now();
        let mem = Tree::new(leaves.iter().copied());
        println!(
            "in-memory tree of {N} leaves (migration's hashing): {:.2} s",
            t.elapsed().as_secs_f64()
        );
        assert_eq!(mem.size(), N);
        let stored = Stored::new(conn, "big");
        let t = Instant::now();
        let root_n = root(&stored, N)?;
        println!(
            "root from stored nodes: {:.3} ms",
            t.elapsed().as_secs_f64() * 1e3
        );
        let entries = crate::ledger::read_chain(conn, "big")?;
        for index in [0, 1, 499_999, 524_288, N - 2, N - 1] {
            let t = Instant::now();
            let path = inclusion_proof(&stored, index, N)?;
            let gen_ms = t.elapsed().as_secs_f64() * 1e3;
            let file = InclusionProof {
                leaf_index: index,
                tree_size: N,
                inclusion_path: encode_path(&path),
            };
            let bytes = file.text().len();
            let leaf = leaf_input(&entries[index as usize].hash)?;
            let reps = 10_000;
            let t = Instant::now();
            for _ in 0..reps {
                verify_inclusion(&leaf, index, N, std::hint::black_box(&path), &root_n)
                    .map_err(Error::Internal)?;
            }
            let us = t.elapsed().as_secs_f64() * 1e6 / reps as f64;
            println!(
                "inclusion of {index} in {N}: {} hashes, {bytes} bytes JSON, generated in \
                 {gen_ms:.2} ms from stored nodes, verified in {us:.1} us",
                path.len()
            );
        }
        for first in [1, 2, 499_999, 524_288, 999_000, N - 1] {
            let first_root = root(&stored, first)?;
            let t = Instant::now();
            let path = consistency_proof(&stored, first, N)?;
            let gen_ms = t.elapsed().as_secs_f64() * 1e3;
            let file = ConsistencyProof {
                first_size: first,
                second_size: N,
                consistency_path: encode_path(&path),
            };
            let bytes = file.text().len();
            let reps = 10_000;
            let t = Instant::now();
            for _ in 0..reps {
                verify_consistency(first, N, std::hint::black_box(&path), &first_root, &root_n)
                    .map_err(Error::Internal)?;
            }
            let us = t.elapsed().as_secs_f64() * 1e6 / reps as f64;
            println!(
                "consistency {first} -> {N}: {} hashes, {bytes} bytes JSON, generated in \
                 {gen_ms:.2} ms, verified in {us:.1} us",
                path.len()
            );
        }
        let (_, note) =
            crate::audit::anchor::note_checkpoint(conn, "big", "2026-12-03T20:00:00Z", false)?;
        println!("format-3 checkpoint: {} bytes", note.len());
        Ok(())
    }
}
