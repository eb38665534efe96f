//! An index from names to positions in a list the caller owns (part names, node names, the
//! keys of a large TOML table): each name is stored once, in that list, and the index keeps
//! only a 32-bit position per name (hashbrown's `HashTable` with foldhash), so a design of
//! 200,000 parts pays a few bytes per name for its look-ups instead of a second copy of
//! every name.

use hashbrown::{DefaultHashBuilder, HashTable};
use std::hash::BuildHasher;

/// Positions of names in a caller-owned list, found by name.
#[derive(Clone, Default)]
pub struct NameIndex {
    table: HashTable<u32>,
    state: DefaultHashBuilder,
}

impl std::fmt::Debug for NameIndex {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "NameIndex({} names)", self.table.len())
    }
}

/// The index is derived from the list it serves: two indexes compare equal, so a type that
/// holds a list and its index compares by the list alone.
impl PartialEq for NameIndex {
    fn eq(&self, _other: &Self) -> bool {
        true
    }
}

impl NameIndex {
    /// The position of `name`, where `at(position)` gives the name stored at a position.
    pub fn find<'a>(&self, name: &str, at: impl Fn(u32) -> &'a str) -> Option<u32> {
        let hash = self.state.hash_one(name);
        self.table.find(hash, |&p| at(p) == name).copied()
    }

    /// Records that `name` is at `position` (the caller has checked it is new).
    pub fn insert<'a>(&mut self, name: &str, position: u32, at: impl Fn(u32) -> &'a str) {
        let hash = self.state.hash_one(name);
        let state = &self.state;
        self.table
            .insert_unique(hash, position, |&p| state.hash_one(at(p)));
    }

    /// Makes room for `additional` more names (`at` as in [`NameIndex::insert`]).
    pub fn reserve<'a>(&mut self, additional: usize, at: impl Fn(u32) -> &'a str) {
        let state = &self.state;
        self.table.reserve(additional, |&p| state.hash_one(at(p)));
    }

    /// Number of names indexed.
    pub fn len(&self) -> usize {
        self.table.len()
    }

    /// Whether no name is indexed.
    pub fn is_empty(&self) -> bool {
        self.table.is_empty()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_every_name_it_was_given() {
        let names: Vec<String> = (0..5000).map(|k| format!("R{k}")).collect();
        let mut ix = NameIndex::default();
        for (k, n) in names.iter().enumerate() {
            let at = |p: u32| names[p as usize].as_str();
            assert_eq!(ix.find(n, at), None);
            ix.insert(n, k as u32, at);
        }
        let at = |p: u32| names[p as usize].as_str();
        for (k, n) in names.iter().enumerate() {
            assert_eq!(ix.find(n, at), Some(k as u32));
        }
        assert_eq!(ix.find("R5000", at), None);
        assert_eq!(ix.len(), 5000);
    }
}
