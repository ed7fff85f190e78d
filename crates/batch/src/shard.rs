//! Deterministic shares of a batch (`--shard K/N`).

use std::str::FromStr;

use sha2::{Digest, Sha256};

/// Share `index` of `count`: the items whose id hashes to `index - 1` modulo `count`
/// (1 ≤ index ≤ count). Hashing the id (not the position) keeps an item's share fixed when the
/// list is reordered or extended, and SHA-256 gives the same share on every machine and Rust
/// version.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shard {
    /// 1-based share number.
    pub index: u64,
    /// Number of shares.
    pub count: u64,
}

impl FromStr for Shard {
    type Err = String;

    /// Reads `K/N`.
    fn from_str(text: &str) -> Result<Self, String> {
        let (k, n) = text
            .split_once('/')
            .ok_or_else(|| format!("expected K/N, e.g. 3/8, found {text:?}"))?;
        let parse = |s: &str| s.trim().parse::<u64>().ok();
        match (parse(k), parse(n)) {
            (Some(index), Some(count)) if count >= 1 && (1..=count).contains(&index) => {
                Ok(Shard { index, count })
            }
            _ => Err(format!(
                "expected K/N with whole numbers 1 ≤ K ≤ N, found {text:?}"
            )),
        }
    }
}

impl Shard {
    /// True when the item `id` belongs to this share.
    pub fn takes(&self, id: &str) -> bool {
        let digest = Sha256::digest(id.as_bytes());
        let mut first = [0u8; 8];
        first.copy_from_slice(&digest[..8]);
        u64::from_le_bytes(first) % self.count == self.index - 1
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shards_partition_the_items() {
        assert!("0/3".parse::<Shard>().is_err());
        assert!("4/3".parse::<Shard>().is_err());
        assert!("x".parse::<Shard>().is_err());
        let shards: Vec<Shard> = (1..=3).map(|k| format!("{k}/3").parse().unwrap()).collect();
        let ids: Vec<String> = (0..300).map(|i| format!("utt{i:04}")).collect();
        let mut sizes = [0; 3];
        for id in &ids {
            let owners: Vec<usize> = (0..3).filter(|&s| shards[s].takes(id)).collect();
            assert_eq!(owners.len(), 1, "{id} belongs to exactly one shard");
            sizes[owners[0]] += 1;
        }
        assert!(sizes.iter().all(|&n| n > 60), "{sizes:?}");
    }

    #[test]
    fn shares_follow_sha256_of_the_id() {
        // Python: int.from_bytes(hashlib.sha256(id.encode()).digest()[:8], "little") % N + 1
        for (id, of_5, of_8) in [
            ("utt0007", 4, 4),
            ("interview1", 5, 3),
            ("fells06-0001", 2, 4),
        ] {
            let five: Shard = format!("{of_5}/5").parse().unwrap();
            let eight: Shard = format!("{of_8}/8").parse().unwrap();
            assert!(five.takes(id) && eight.takes(id), "{id}");
        }
    }
}
