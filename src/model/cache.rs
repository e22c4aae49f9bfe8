//! The key/value cache of the decoder: every sequence in its own slot of buffers allocated
//! once, so steady decoding allocates nothing and a finished slot can take the next question
//! at once.
//!
//! A token's position id is its index in its slot, which is why the decoder needs no padding
//! and no mask tensor.

/// Keys and values of every layer for a fixed number of sequence slots, allocated once.
///
/// Layer l keeps k and v as [slots, capacity, n_kv_heads · head_dim]. A slot is emptied by
/// [`KvCache::reset`] and refilled by the next forward call that names it. A prefix shared by
/// every prompt can be stored once ([`KvCache::save_prefix`]) and copied into a fresh slot
/// ([`KvCache::load_prefix`]) instead of being computed again.
#[derive(Debug)]
pub struct KvCache {
    pub(super) slots: usize,
    pub(super) capacity: usize,
    kv_dim: usize,
    /// Per layer, [slots, capacity, kv_dim].
    pub(super) k: Vec<Vec<f32>>,
    pub(super) v: Vec<Vec<f32>>,
    /// Positions each slot holds.
    pub(super) lens: Vec<usize>,
    /// Saved prefixes by key (one per model variant: an adapter changes the keys and values).
    prefixes: Vec<Option<SavedPrefix>>,
}

/// A saved shared prefix: its length and, per layer, k and v as [len, kv_dim].
#[derive(Debug)]
struct SavedPrefix {
    len: usize,
    k: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
}

impl KvCache {
    /// An empty cache of `slots` sequences of up to `capacity` positions each, for `layers`
    /// layers of `kv_dim` key (and value) channels per position.
    pub(super) fn new(layers: usize, slots: usize, capacity: usize, kv_dim: usize) -> KvCache {
        let per_layer = slots * capacity * kv_dim;
        KvCache {
            slots,
            capacity,
            kv_dim,
            k: (0..layers).map(|_| vec![0.0; per_layer]).collect(),
            v: (0..layers).map(|_| vec![0.0; per_layer]).collect(),
            lens: vec![0; slots],
            prefixes: Vec::new(),
        }
    }

    /// Empties `slot` (its old keys are overwritten by the next sequence).
    pub fn reset(&mut self, slot: usize) {
        self.lens[slot] = 0;
    }

    /// Keeps a copy of what `slot` holds as the shared prefix under `key`.
    pub fn save_prefix(&mut self, slot: usize, key: usize) {
        let n = self.lens[slot] * self.kv_dim;
        let at = slot * self.capacity * self.kv_dim;
        let k = self.k.iter().map(|l| l[at..at + n].to_vec()).collect();
        let v = self.v.iter().map(|l| l[at..at + n].to_vec()).collect();
        if self.prefixes.len() <= key {
            self.prefixes.resize_with(key + 1, || None);
        }
        self.prefixes[key] = Some(SavedPrefix {
            len: self.lens[slot],
            k,
            v,
        });
    }

    /// Makes `slot` hold exactly the prefix saved under `key`; returns its length (0 when none
    /// is saved).
    pub fn load_prefix(&mut self, slot: usize, key: usize) -> usize {
        let Some(Some(SavedPrefix { len, k, v })) = self.prefixes.get(key) else {
            self.lens[slot] = 0;
            return 0;
        };
        let n = len * self.kv_dim;
        let at = slot * self.capacity * self.kv_dim;
        for (dst, src) in self.k.iter_mut().zip(k) {
            dst[at..at + n].copy_from_slice(src);
        }
        for (dst, src) in self.v.iter_mut().zip(v) {
            dst[at..at + n].copy_from_slice(src);
        }
        self.lens[slot] = *len;
        *len
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A saved prefix comes back in another slot exactly, and only as long as it was.
    #[test]
    fn prefix_round_trips_into_another_slot() {
        let mut c = KvCache::new(2, 3, 5, 4);
        let at = 5 * 4; // slot 1
        for l in 0..2 {
            for i in 0..2 * 4 {
                c.k[l][at + i] = (l * 100 + i) as f32;
                c.v[l][at + i] = -((l * 100 + i) as f32);
            }
        }
        c.lens[1] = 2;
        c.save_prefix(1, 1);
        assert_eq!(c.load_prefix(2, 1), 2);
        assert_eq!(c.load_prefix(0, 0), 0, "nothing saved under another key");
        assert_eq!(c.lens[2], 2);
        let at2 = 2 * 5 * 4;
        for l in 0..2 {
            assert_eq!(c.k[l][at2..at2 + 8], c.k[l][at..at + 8]);
            assert_eq!(c.v[l][at2..at2 + 8], c.v[l][at..at + 8]);
        }
        c.reset(2);
        assert_eq!(c.lens[2], 0);
        let mut fresh = KvCache::new(1, 1, 2, 1);
        assert_eq!(fresh.load_prefix(0, 0), 0);
    }
}
