//! The index from node ids to node positions, without a second copy of the
//! ids: a hash table of positions (open addressing, linear probing), each
//! slot keeping its id's hash beside the position. A lookup hashes the id
//! and compares it with the id of the node a matching slot names, which the
//! caller supplies. For a million nodes it takes 16 MiB, where a map from
//! copied ids took about 100.

use std::hash::BuildHasher;

/// A slot: the id's hash in the high half, the position in the low half.
type Slot = u64;

/// An empty slot (no position is `u32::MAX`: positions are below it).
const EMPTY: Slot = u64::MAX;

/// Maps node ids to node positions; see the module documentation.
#[derive(Debug, Clone)]
pub(crate) struct IdIndex {
    /// A power of two in length, at most half full.
    slots: Vec<Slot>,
    len: usize,
    hasher: std::collections::hash_map::RandomState,
}

impl IdIndex {
    pub(crate) fn new() -> IdIndex {
        IdIndex {
            slots: vec![EMPTY; 16],
            len: 0,
            hasher: Default::default(),
        }
    }

    fn hash(&self, id: &str) -> u32 {
        // The high bits of the 64-bit hash: the low ones pick the slot.
        (self.hasher.hash_one(id) >> 32) as u32
    }

    fn start(&self, hash: u32) -> usize {
        (hash as usize).wrapping_mul(0x9E37_79B9) & (self.slots.len() - 1)
    }

    /// The position of `id`, where `id_of` gives the id of each position
    /// already inserted.
    pub(crate) fn get<'a>(&self, id: &str, id_of: impl Fn(usize) -> &'a str) -> Option<usize> {
        let hash = self.hash(id);
        let mask = self.slots.len() - 1;
        let mut at = self.start(hash);
        loop {
            let slot = self.slots[at];
            if slot == EMPTY {
                return None;
            }
            let position = (slot & 0xFFFF_FFFF) as usize;
            if (slot >> 32) as u32 == hash && id_of(position) == id {
                return Some(position);
            }
            at = (at + 1) & mask;
        }
    }

    /// Adds `id` at `position` (below `u32::MAX`), unless it is there
    /// already: then the position it has is returned and nothing changes.
    pub(crate) fn insert<'a>(
        &mut self,
        id: &str,
        position: usize,
        id_of: impl Fn(usize) -> &'a str,
    ) -> Result<(), usize> {
        let position = u32::try_from(position)
            .ok()
            .filter(|&position| position != u32::MAX)
            .expect("fewer than 2^32 - 1 nodes (a text trace is at most 4 GiB)");
        if let Some(first) = self.get(id, id_of) {
            return Err(first);
        }
        if (self.len + 1) * 2 > self.slots.len() {
            self.grow();
        }
        let hash = self.hash(id);
        self.place(((hash as u64) << 32) | position as u64);
        self.len += 1;
        Ok(())
    }

    fn place(&mut self, slot: Slot) {
        let mask = self.slots.len() - 1;
        let mut at = self.start((slot >> 32) as u32);
        while self.slots[at] != EMPTY {
            at = (at + 1) & mask;
        }
        self.slots[at] = slot;
    }

    /// Twice the slots; the kept hashes place every entry again without
    /// reading an id.
    fn grow(&mut self) {
        let doubled = vec![EMPTY; self.slots.len() * 2];
        let old = std::mem::replace(&mut self.slots, doubled);
        for slot in old.into_iter().filter(|&slot| slot != EMPTY) {
            self.place(slot);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Against std's HashMap as the reference (common practice).
    #[test]
    fn finds_what_a_hash_map_finds() {
        let ids: Vec<String> = (0..5000)
            .map(|k| format!("n{}", (k * 7919) % 3000))
            .collect();
        let mut index = IdIndex::new();
        let mut reference = std::collections::HashMap::new();
        for (position, id) in ids.iter().enumerate() {
            let first = *reference.entry(id.as_str()).or_insert(position);
            let inserted = index.insert(id, position, |at| ids[at].as_str());
            if first == position {
                assert_eq!(inserted, Ok(()));
            } else {
                assert_eq!(inserted, Err(first), "{id}");
            }
        }
        assert_eq!(index.len, reference.len());
        for probe in ["n0", "n2999", "n3000", "", "x"] {
            assert_eq!(
                index.get(probe, |at| ids[at].as_str()),
                reference.get(probe).copied(),
                "{probe}"
            );
        }
        assert!(index.slots.len() >= 2 * index.len);
    }
}
