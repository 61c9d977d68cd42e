//! Packing a block's running paths into its lowest lanes.
//!
//! Once some paths of a block have ended (an autocall redeemed them), the operations and
//! the steps still to come need only the paths that run. A [`Packing`] records which of
//! the first `lanes` lanes run and moves a lane's values so that the running lanes come
//! first, in lane order, and (where what follows reads every lane) the ended ones behind
//! them, in lane order too. The moves are the same whichever way they are made: with
//! AVX-512, eight lanes at a time by the compress instruction; else one lane at a time.

use super::BLOCK;

/// Where a packing of a block's first lanes moves each of them.
#[derive(Clone, Debug)]
pub struct Packing {
    /// Per group of eight lanes, bit `i` set when lane `8g + i` runs.
    masks: Vec<u8>,
    lanes: usize,
    running: usize,
    /// The running lanes in lane order, then the ended ones in lane order; built when
    /// first asked for.
    order: Vec<u32>,
    ordered: bool,
    /// The ended lanes' values on their way behind the running ones.
    held: Vec<f64>,
}

impl Default for Packing {
    fn default() -> Self {
        Packing {
            masks: Vec::with_capacity(BLOCK / 8),
            lanes: 0,
            running: 0,
            order: Vec::with_capacity(BLOCK + 1),
            ordered: false,
            held: vec![0.0; BLOCK],
        }
    }
}

impl Packing {
    /// Plans the packing of the first `ended_at.len()` lanes, a lane running on when its
    /// entry (the grid index of the date it ended on, +∞ while it runs) is past `after`,
    /// the last date stepped to: it is still to be stepped. Returns how many run on.
    pub fn plan(&mut self, ended_at: &[f64], after: f64) -> usize {
        let lanes = ended_at.len();
        assert!(lanes <= BLOCK, "a packing covers one block's lanes");
        self.lanes = lanes;
        self.masks.clear();
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for AVX-512F.
                unsafe { self.masks_avx512(ended_at, after) };
            } else {
                self.masks_generic(ended_at, after);
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        self.masks_generic(ended_at, after);
        self.running = self.masks.iter().map(|m| m.count_ones() as usize).sum();
        self.ordered = false;
        self.running
    }

    fn masks_generic(&mut self, ended_at: &[f64], after: f64) {
        self.masks.extend(ended_at.chunks(8).map(|group| mask(group, after)));
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    unsafe fn masks_avx512(&mut self, ended_at: &[f64], after: f64) {
        use std::arch::x86_64::*;
        let after_v = _mm512_set1_pd(after);
        let mut groups = ended_at.chunks_exact(8);
        for group in &mut groups {
            // SAFETY: the group holds eight lanes.
            let v = _mm512_loadu_pd(group.as_ptr());
            self.masks.push(_mm512_cmp_pd_mask::<_CMP_GT_OQ>(v, after_v));
        }
        let rest = groups.remainder();
        if !rest.is_empty() {
            self.masks.push(mask(rest, after));
        }
    }

    /// How many of the lanes run.
    pub fn running(&self) -> usize {
        self.running
    }

    fn runs(&self, lane: usize) -> bool {
        self.masks[lane / 8] >> (lane % 8) & 1 == 1
    }

    /// The lane each position takes its values from: the running lanes, then the ended.
    fn order(&mut self) -> &[u32] {
        if !self.ordered {
            // Without a branch per lane: write every lane's index, advance past the ones
            // that belong in this part (one spare slot for the last write).
            let lanes = self.lanes;
            let mut order = std::mem::take(&mut self.order);
            order.clear();
            order.resize(lanes + 1, 0);
            let mut at = 0;
            for lane in 0..lanes {
                order[at] = lane as u32;
                at += usize::from(self.runs(lane));
            }
            for lane in 0..lanes {
                order[at] = lane as u32;
                at += usize::from(!self.runs(lane));
            }
            order.truncate(lanes);
            self.order = order;
            self.ordered = true;
        }
        &self.order
    }

    /// Moves the running lanes' values to the front, in lane order; what is left in the
    /// other lanes of the packed range is undefined. Lanes from `lanes` on are untouched.
    pub fn front(&mut self, values: &mut [f64]) {
        assert!(values.len() >= self.lanes);
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for AVX-512F, and `values` holds
                // every lane the masks cover.
                unsafe { self.front_avx512(values) };
                return;
            }
        }
        self.front_generic(values);
    }

    /// Moves the running lanes' values to the front and the ended lanes' behind them,
    /// each in lane order. Lanes from `lanes` on are untouched.
    pub fn all(&mut self, values: &mut [f64]) {
        let (running, lanes) = (self.running, self.lanes);
        // The ended lanes' values first, as `front` may write over them.
        let mut held = std::mem::take(&mut self.held);
        #[cfg(target_arch = "x86_64")]
        {
            if super::wide_lanes() {
                // SAFETY: the CPU has just been checked for AVX-512F.
                unsafe { self.ended_avx512(values, &mut held) };
            } else {
                self.ended_generic(values, &mut held);
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        self.ended_generic(values, &mut held);
        self.front(values);
        values[running..lanes].copy_from_slice(&held[..lanes - running]);
        self.held = held;
    }

    /// [`Packing::all`] for whole numbers.
    pub fn all_u32(&mut self, values: &mut [u32]) {
        let lanes = self.lanes;
        let mut held = [0u32; BLOCK];
        for (h, &lane) in held.iter_mut().zip(self.order()) {
            *h = values[lane as usize];
        }
        values[..lanes].copy_from_slice(&held[..lanes]);
    }

    /// The ended lanes' values into `held`, in lane order.
    fn ended_generic(&self, values: &[f64], held: &mut [f64]) {
        // Without a branch per lane: write every lane, advance past the ended ones (`at`
        // never passes the lane written).
        let mut at = 0;
        for (lane, &v) in values[..self.lanes].iter().enumerate() {
            held[at] = v;
            at += usize::from(!self.runs(lane));
        }
    }

    /// [`Packing::ended_generic`], eight lanes at a time.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    unsafe fn ended_avx512(&self, values: &[f64], held: &mut [f64]) {
        use std::arch::x86_64::*;
        let mut at = 0;
        for (g, &mask) in self.masks.iter().enumerate() {
            let first = 8 * g;
            // The group's lanes within the packed range that ended.
            let within = if first + 8 <= self.lanes { 0xff } else { (1u8 << (self.lanes - first)) - 1 };
            let ended = !mask & within;
            if first + 8 <= self.lanes && at + 8 <= held.len() {
                // SAFETY: lanes `first..first + 8` lie within `values`, and `at..at + 8`
                // within `held`.
                let v = _mm512_loadu_pd(values.as_ptr().add(first));
                _mm512_storeu_pd(held.as_mut_ptr().add(at), _mm512_maskz_compress_pd(ended, v));
                at += ended.count_ones() as usize;
            } else {
                for i in (0..8).filter(|i| ended & (1 << i) != 0) {
                    held[at] = values[first + i];
                    at += 1;
                }
            }
        }
    }

    fn front_generic(&mut self, values: &mut [f64]) {
        // In place: a running lane moves to a position at or below its own, after every
        // lane below it has been read.
        let running = self.running;
        for (at, &lane) in self.order()[..running].iter().enumerate() {
            values[at] = values[lane as usize];
        }
    }

    /// Eight lanes at a time: a group's running lanes are compressed to the bottom of a
    /// register and the register stored at the next free position, which lies at or
    /// below the group's own (and, for a group it would overrun the packed range from,
    /// lane by lane instead).
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx512f")]
    unsafe fn front_avx512(&self, values: &mut [f64]) {
        use std::arch::x86_64::*;
        let base = values.as_mut_ptr();
        let mut at = 0;
        for (g, &mask) in self.masks.iter().enumerate() {
            let first = 8 * g;
            if first + 8 <= self.lanes && at + 8 <= self.lanes {
                // SAFETY: lanes `first..first + 8` and `at..at + 8` lie within the packed
                // range, which `values` holds.
                let v = _mm512_loadu_pd(base.add(first));
                _mm512_storeu_pd(base.add(at), _mm512_maskz_compress_pd(mask, v));
                at += mask.count_ones() as usize;
            } else {
                for i in (0..8).filter(|i| mask & (1 << i) != 0) {
                    values[at] = values[first + i];
                    at += 1;
                }
            }
        }
        debug_assert_eq!(at, self.running);
    }
}

/// Bit `i` set when lane `i` of a group is past `after`.
fn mask(group: &[f64], after: f64) -> u8 {
    group.iter().enumerate().fold(0u8, |m, (i, &e)| m | u8::from(e > after) << i)
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_pcg::Pcg64;

    /// Running lanes in lane order, then (for `all`) the ended in lane order; the lanes
    /// past the packed range untouched.
    #[test]
    fn packs_running_lanes_first_in_lane_order() {
        let mut rng = Pcg64::seed_from_u64(11);
        for lanes in [0, 1, 7, 8, 9, 63, 64, 100, 255, 256] {
            for share in [0.0, 0.1, 0.5, 0.9, 1.0] {
                let runs: Vec<bool> = (0..lanes).map(|_| rng.gen::<f64>() < share).collect();
                // Running on: still running, or ending on a date not yet stepped to (5).
                let ended_at: Vec<f64> = runs
                    .iter()
                    .enumerate()
                    .map(|(i, &r)| {
                        if !r {
                            3.0
                        } else if i % 3 == 0 {
                            5.0
                        } else {
                            f64::INFINITY
                        }
                    })
                    .collect();
                let values: Vec<f64> = (0..BLOCK).map(|i| i as f64).collect();
                let mut packing = Packing::default();
                let running = packing.plan(&ended_at, 4.0);
                let expect_front: Vec<f64> = (0..lanes).filter(|&i| runs[i]).map(|i| i as f64).collect();
                let expect_back: Vec<f64> = (0..lanes).filter(|&i| !runs[i]).map(|i| i as f64).collect();
                assert_eq!(running, expect_front.len());

                let mut front = values.clone();
                packing.front(&mut front);
                assert_eq!(front[..running], expect_front[..]);
                assert_eq!(front[lanes..], values[lanes..], "lanes past the range untouched");

                let mut generic = values.clone();
                packing.front_generic(&mut generic);
                assert_eq!(generic[..running], expect_front[..]);

                let mut held = vec![0.0; BLOCK];
                packing.ended_generic(&values, &mut held);
                assert_eq!(held[..lanes - running], expect_back[..]);
                let mut generic_masks = Packing { lanes, ..Packing::default() };
                generic_masks.masks_generic(&ended_at, 4.0);
                assert_eq!(generic_masks.masks, packing.masks);

                let mut all = values.clone();
                packing.all(&mut all);
                assert_eq!(all[..running], expect_front[..]);
                assert_eq!(all[running..lanes], expect_back[..]);
                assert_eq!(all[lanes..], values[lanes..]);

                let mut whole: Vec<u32> = (0..BLOCK as u32).collect();
                packing.all_u32(&mut whole);
                let as_f64: Vec<f64> = whole.iter().map(|&u| f64::from(u)).collect();
                assert_eq!(as_f64, all);
            }
        }
    }
}
