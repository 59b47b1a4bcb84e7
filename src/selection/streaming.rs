//! Conditional calibration and the BH count with the pool streamed: memory `O(n)` plus what
//! a memory budget allows, instead of `O(m)` (design.md 2.4, last paragraph; the derivation
//! and its tie rules are in docs/streaming.md).
//!
//! The pool is a [`PoolSource`]: something that can be read several times, in the same
//! order each time, as `(score, weight)` per unit. The passes:
//!
//! 1. **Histogram.** Each unit's bucket `c = #{i : V_i < Vh_j}` (0..=n), the count per bucket
//!    and the largest pool score per bucket; `m`. Checks scores and weights.
//! 2. **Decide.** `A(k)` is constant within a bucket, and every decision
//!    [`within_level`]`(A + ..., W + w_j, q k / m)` is monotone in `k`, so each region of
//!    the `K_j` search is decided at bucket ends (the high region needs only "is there a
//!    pool score above mine in my bucket", the largest score per bucket). The one exception
//!    is the low-region candidate in the unit's own bucket, `k = b_j`, which needs the exact
//!    rank `b_j = #{l : Vh_l <= Vh_j}`; only units whose other candidates fail and for whom
//!    that candidate could pass (it passes at the bucket end) are queued for ranking.
//!    Also the BH rank histogram, the unreachable and floor counts.
//! 3. **Rank** (only when units were queued): one pass counts, for the sorted queued scores,
//!    how many pool scores lie at or below each (a difference array; `O(m log |Q|)`).
//!    Queued units beyond the budget are handled in further collect-and-rank rounds.
//! 4. Pruning from the first-step keys (`O(distinct K)` for homogeneous and deterministic
//!    pruning, one key per first-step unit for heterogeneous), with the same seeded draws
//!    as [`super::pruning::prune_with`]; BH's count from the rank histogram, refined by an
//!    exact pass over the candidate blocks when the histogram had to be coarse.
//! 5. [`StreamingSelection::for_each_unit`]: a last pass gives every unit's `K_j`, first
//!    step, selection and p-value in input order.
//!
//! Every decision goes through [`within_level`], with the same floating-point numbers as
//! the in-memory path ([`super::conditional`], [`super::bh`]), so the results are identical
//! (tests/streaming_selection.rs checks this unit by unit).

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{self, BufReader, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::Path;

use rand::Rng;
use rayon::prelude::*;
use thiserror::Error;

use super::bh::TIE_TOLERANCE;
use super::bh::{bh_level, check_fdr, first_passing_rank, within_level, SelectionError};
use super::conditional::{right_to_left_maxima, scan_left, FILTER_MARGIN};
use super::pruning::Pruning;
use crate::conformal::pvalue::{CalibrationSet, PValueError, PValueKind};
use crate::random::{stream, Stream};

/// Units per chunk handed to a pass's visitor by the sources in this module.
pub const CHUNK: usize = 1 << 16;

/// Why a streamed selection failed.
#[derive(Debug, Error)]
#[non_exhaustive]
pub enum StreamingError {
    /// A precondition of the selection (level, scores, weights).
    #[error(transparent)]
    Selection(#[from] SelectionError),
    /// Reading the pool or a temporary file failed.
    #[error("reading the pool: {0}")]
    Io(#[from] io::Error),
    /// A later pass saw a different pool than the first.
    #[error(
        "the pool changed between passes: {first} units on the first pass, {later} on a later one"
    )]
    Changed { first: u64, later: u64 },
    /// The pool is empty.
    #[error("the pool has no units")]
    EmptyPool,
}

/// What a pass hands each chunk to: scores, and weights (`None` = every weight 1).
pub type ChunkVisitor<'v> = dyn FnMut(&[f64], Option<&[f64]>) + 'v;

/// A pool that can be read more than once, in the same order every time.
pub trait PoolSource {
    /// Visit every unit once, in input order, in chunks: scores, and weights (`None` =
    /// every weight of the chunk is 1).
    ///
    /// # Errors
    /// Whatever reading the source can fail with.
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError>;
}

/// A pool held in memory (tests, and callers that have the columns anyway).
pub struct SlicePool<'a> {
    pub scores: &'a [f64],
    /// `None` = every weight 1.
    pub weights: Option<&'a [f64]>,
}

impl PoolSource for SlicePool<'_> {
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError> {
        for (c, scores) in self.scores.chunks(CHUNK).enumerate() {
            let weights = self
                .weights
                .map(|w| &w[c * CHUNK..c * CHUNK + scores.len()]);
            visit(scores, weights);
        }
        Ok(())
    }
}

/// A pool spilled to an unnamed temporary file as little-endian `f64` (score, and weight
/// when there are weights): for input that cannot be re-read, such as standard input.
pub struct SpilledPool {
    file: File,
    with_weights: bool,
    units: u64,
}

/// Writes a [`SpilledPool`].
pub struct SpillWriter {
    out: BufWriter<File>,
    with_weights: bool,
    units: u64,
}

impl SpillWriter {
    /// A new spill file in `dir` (the system's temporary folder when `None`); the file has
    /// no name and disappears when closed.
    ///
    /// # Errors
    /// The file cannot be created.
    pub fn new(dir: Option<&Path>, with_weights: bool) -> io::Result<Self> {
        let file = match dir {
            Some(d) => tempfile::tempfile_in(d)?,
            None => tempfile::tempfile()?,
        };
        Ok(SpillWriter {
            out: BufWriter::with_capacity(1 << 20, file),
            with_weights,
            units: 0,
        })
    }

    /// Append one unit (`weight` is ignored for a file without weights).
    ///
    /// # Errors
    /// Writing fails.
    pub fn push(&mut self, score: f64, weight: f64) -> io::Result<()> {
        self.out.write_all(&score.to_le_bytes())?;
        if self.with_weights {
            self.out.write_all(&weight.to_le_bytes())?;
        }
        self.units += 1;
        Ok(())
    }

    /// Finish writing; the result can be read any number of times.
    ///
    /// # Errors
    /// Flushing fails.
    pub fn finish(self) -> io::Result<SpilledPool> {
        let file = self.out.into_inner().map_err(|e| e.into_error())?;
        Ok(SpilledPool {
            file,
            with_weights: self.with_weights,
            units: self.units,
        })
    }
}

impl SpilledPool {
    /// Number of units written.
    pub fn len(&self) -> u64 {
        self.units
    }

    /// True when no unit was written.
    pub fn is_empty(&self) -> bool {
        self.units == 0
    }
}

impl PoolSource for SpilledPool {
    fn pass(&mut self, visit: &mut ChunkVisitor<'_>) -> Result<(), StreamingError> {
        self.file.seek(SeekFrom::Start(0))?;
        let mut reader = BufReader::with_capacity(1 << 20, &self.file);
        let per_unit = if self.with_weights { 16 } else { 8 };
        let mut bytes = vec![0u8; CHUNK * per_unit];
        let mut scores = Vec::with_capacity(CHUNK);
        let mut weights = Vec::with_capacity(CHUNK);
        let mut left = self.units;
        while left > 0 {
            let take = left.min(CHUNK as u64) as usize;
            let buf = &mut bytes[..take * per_unit];
            reader.read_exact(buf)?;
            scores.clear();
            weights.clear();
            for unit in buf.chunks_exact(per_unit) {
                scores.push(f64::from_le_bytes(unit[..8].try_into().expect("8 bytes")));
                if self.with_weights {
                    weights.push(f64::from_le_bytes(unit[8..].try_into().expect("8 bytes")));
                }
            }
            visit(&scores, self.with_weights.then_some(&weights[..]));
            left -= take as u64;
        }
        Ok(())
    }
}

/// What a streamed selection is asked to do.
#[derive(Clone, Copy, Debug)]
pub struct StreamingOptions {
    /// FDR level `q` in (0, 1].
    pub q: f64,
    pub pruning: Pruning,
    /// Seed of the pruning draws and of randomized p-values.
    pub seed: u64,
    /// p-values behind the BH count (conservative or randomized).
    pub bh_pvalues: PValueKind,
    /// Bytes the passes may hold beyond the `O(n)` summary: queued units for ranking, the
    /// BH rank histogram, the ranked units' counts before they go to a temporary file.
    pub memory_budget: usize,
}

/// Counts of a streamed selection.
#[derive(Clone, Debug, PartialEq)]
pub struct StreamingSummary {
    /// Pool size.
    pub m: usize,
    /// `|R1|`.
    pub first_step_count: usize,
    /// `|R| = r*`.
    pub selected_count: usize,
    /// The shared draw of homogeneous pruning.
    pub pruning_draw: Option<f64>,
    /// How many BH at level q selects on the `bh_pvalues` p-values.
    pub bh_selected_count: usize,
    /// Units whose p-value floor exceeds q.
    pub unreachable_count: usize,
    /// Units below every labeled score (p-value at the floor).
    pub floor_count: usize,
    /// Units whose `K_j` needed their exact rank among the pool scores.
    pub ranked_units: usize,
    /// Passes over the pool so far (not counting [`StreamingSelection::for_each_unit`]).
    pub passes: usize,
    /// True when the ranked units' counts went to a temporary file.
    pub spilled: bool,
}

/// One unit's results, handed out in input order by [`StreamingSelection::for_each_unit`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct UnitResult {
    /// `K_j`.
    pub conditional_count: usize,
    /// `p_j <= q K_j / m`.
    pub first_step: bool,
    /// In the shortlist after pruning.
    pub selected: bool,
    /// Selected by BH on the `bh_pvalues` p-values.
    pub bh_selected: bool,
    /// Conservative p-value `p_j` as numerator over denominator.
    pub numerator: f64,
    pub denominator: f64,
}

/// One unit's results as the decide pass knows them, handed out in input order by
/// [`run_streaming_visiting`]: before `r*` and before the exact ranks of the units that
/// need one. [`StreamingSelection::for_each_ranked`] settles those, and
/// [`StreamingSelection::selects`] gives the selection, so a caller can have every unit's
/// results without the last pass of [`StreamingSelection::for_each_unit`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct EarlyUnit {
    /// `K_j`; `None` when it needs the unit's exact rank among the pool scores.
    pub conditional_count: Option<usize>,
    /// `p_j <= q K_j / m` (false while `K_j` is not known).
    pub first_step: bool,
    /// Conservative p-value `p_j` as numerator over denominator.
    pub numerator: f64,
    pub denominator: f64,
    /// The unit's pruning draw `xi_j` (the shared one unless pruning is heterogeneous).
    pub xi: f64,
}

/// How the `K_j` search of one unit ends without the pool's ranks.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Decision {
    /// `K_j` is known.
    Known(usize),
    /// `K_j = b_j` if the own-bucket low candidate passes at the exact rank `b_j`,
    /// else `fallback`. `entry` is the unit's bucket among the non-empty ones.
    NeedsRank { entry: u32, fallback: usize },
}

/// Rightmost index in `[0, hi]` with a value `<= x`: a minimum tree over a small array
/// (the non-empty buckets).
struct MinTree {
    size: usize,
    tree: Vec<f64>,
}

impl MinTree {
    fn new(values: &[f64]) -> Self {
        let size = values.len().next_power_of_two().max(1);
        let mut tree = vec![f64::INFINITY; 2 * size];
        tree[size..size + values.len()].copy_from_slice(values);
        for node in (1..size).rev() {
            tree[node] = tree[2 * node].min(tree[2 * node + 1]);
        }
        MinTree { size, tree }
    }

    /// Without recursion: from leaf `hi` up to the nearest subtree on the left whose
    /// minimum is `<= x`, then down its rightmost such path. Only indices `<= hi` are
    /// looked at, so the padding leaves (`+inf`) never count. The filters are finite or
    /// infinite, never NaN.
    fn rightmost_at_most(&self, hi: usize, x: f64) -> Option<usize> {
        let mut node = self.size + hi;
        if self.tree[node] <= x {
            return Some(hi);
        }
        loop {
            // Up while a left child: the parent starts where this node starts.
            while node & 1 == 0 {
                node >>= 1;
            }
            if node == 1 {
                return None;
            }
            // The left sibling: the subtree just left of everything looked at so far.
            node -= 1;
            if self.tree[node] <= x {
                while node < self.size {
                    node = 2 * node + 1;
                    if self.tree[node] > x {
                        node -= 1;
                    }
                }
                return Some(node - self.size);
            }
        }
    }
}

/// The `O(n)` summary of pass 1 with the filters of pass 2: everything a unit's decision
/// reads besides its own score and weight (the "broadcast arrays" of docs/streaming.md).
/// `#{i : V_i < s}` over sorted labeled scores without a search of the whole array: a
/// grid of `cells` equal cells over the finite labeled range, `start[c]` = labeled scores
/// in cells before `c`, then a search within `s`'s cell only. Exact: `cell` is monotone in
/// its argument (a subtraction, a product by a positive number, a saturating cast), so a
/// labeled score in an earlier cell is below `s` and one in a later cell is above it.
#[derive(Clone, Debug)]
struct BucketIndex {
    lo: f64,
    scale: f64,
    /// `start[c]` for `c` in `0..=cells`.
    start: Vec<u32>,
}

impl BucketIndex {
    fn new(sorted: &[f64]) -> Self {
        let finite = || sorted.iter().copied().filter(|v| v.is_finite());
        let lo = finite().next().unwrap_or(0.0);
        let hi = finite().next_back().unwrap_or(0.0);
        let cells = (2 * sorted.len()).clamp(1, 1 << 22);
        let scale = if hi > lo && (hi - lo).is_finite() {
            cells as f64 / (hi - lo)
        } else {
            0.0
        };
        let mut index = BucketIndex {
            lo,
            scale,
            start: vec![0; cells + 1],
        };
        // start[c] = #{v : cell(v) < c}; cell(v) is non-decreasing along `sorted`.
        let mut c = 0;
        for (i, &v) in sorted.iter().enumerate() {
            let cell = index.cell(v);
            while c < cell {
                c += 1;
                index.start[c] = i as u32;
            }
        }
        while c < cells {
            c += 1;
            index.start[c] = sorted.len() as u32;
        }
        index
    }

    /// The cell of `x`: `floor((x - lo) * scale)` clamped to the grid (`-inf` and values
    /// below `lo` in cell 0, `+inf` and values from `hi` in the last).
    #[inline]
    fn cell(&self, x: f64) -> usize {
        let t = (x - self.lo) * self.scale;
        // `as` saturates (and sends NaN, from inf * 0, to 0): monotone in x.
        (t as usize).min(self.start.len() - 2)
    }

    /// `#{v in sorted : v < s}`.
    #[inline]
    fn below(&self, sorted: &[f64], s: f64) -> usize {
        let c = self.cell(s);
        let (from, to) = (self.start[c] as usize, self.start[c + 1] as usize);
        from + sorted[from..to].partition_point(|&v| v < s)
    }

    /// `(#{v < s}, #{v <= s})`: the labeled scores equal to `s` lie in `s`'s cell, so both
    /// searches stay within it.
    #[inline]
    fn below_and_at_or_below(&self, sorted: &[f64], s: f64) -> (usize, usize) {
        let c = self.cell(s);
        let (from, to) = (self.start[c] as usize, self.start[c + 1] as usize);
        let cell = &sorted[from..to];
        let below = cell.partition_point(|&v| v < s);
        let at_or_below = if cell.get(below).is_some_and(|&v| v <= s) {
            below + cell[below..].partition_point(|&v| v <= s)
        } else {
            below
        };
        (from + below, from + at_or_below)
    }
}

struct Summary<'c> {
    calibration: &'c CalibrationSet,
    /// `#{i : V_i < s}` by a grid over the labeled scores.
    index: BucketIndex,
    q: f64,
    m: usize,
    total: f64,
    /// Per bucket (0..=n): index among the non-empty buckets (valid for non-empty ones).
    entry_of_bucket: Vec<u32>,
    /// Per bucket: the largest pool score in it (-inf when empty).
    bucket_max: Vec<f64>,
    /// Per non-empty bucket: 1-based last sorted position `E`.
    ends: Vec<usize>,
    /// Per non-empty bucket: units in it.
    counts: Vec<usize>,
    /// Per non-empty bucket: `A = sum_i w_i 1{V_i < s}` for its scores.
    below: Vec<f64>,
    /// High-region filter at the bucket end (`w <= tau`), widened.
    tau: Vec<f64>,
    high_stairs: Vec<usize>,
    high_values: Vec<f64>,
    /// `#{t in high_values : t < w}` by a grid, as `index` does for the labeled scores
    /// (the search of every unit's weight among the stairs was the decide pass's largest
    /// cost).
    high_index: BucketIndex,
    /// Low-region filter of the candidate `k = E + 1` (`w >= sigma`), widened.
    sigma: Vec<f64>,
    low_tree: MinTree,
}

impl<'c> Summary<'c> {
    fn new(
        calibration: &'c CalibrationSet,
        q: f64,
        bucket_count: &[u64],
        bucket_max: Vec<f64>,
    ) -> Self {
        let total = calibration.total_weight();
        let m: usize = bucket_count.iter().map(|&c| c as usize).sum();
        let mut entry_of_bucket = vec![u32::MAX; bucket_count.len()];
        let (mut ends, mut counts, mut below) = (vec![], vec![], vec![]);
        let mut end = 0usize;
        for (c, &count) in bucket_count.iter().enumerate() {
            if count == 0 {
                continue;
            }
            entry_of_bucket[c] = ends.len() as u32;
            end += count as usize;
            ends.push(end);
            counts.push(count as usize);
            below.push(calibration.prefix_weight(c));
        }
        // The same filters as conditional.rs's weight_filters, at the bucket ends only.
        let tau: Vec<f64> = ends
            .iter()
            .zip(&below)
            .map(|(&k, &a)| {
                let t = bh_level(q, k, m) * (1.0 + TIE_TOLERANCE);
                let slack = 1.0 - t - FILTER_MARGIN;
                if slack <= 0.0 {
                    f64::INFINITY
                } else {
                    (t * total - a + FILTER_MARGIN * (a + total)) / slack
                }
            })
            .collect();
        let sigma: Vec<f64> = ends
            .iter()
            .zip(&below)
            .map(|(&end, &a)| {
                let k = end + 1;
                if k > m {
                    f64::INFINITY // no low candidate beyond m (never queried: last bucket)
                } else if bh_level(q, k, m) >= 1.0 {
                    f64::NEG_INFINITY
                } else {
                    let t = bh_level(q, k, m) * (1.0 + TIE_TOLERANCE);
                    a * (1.0 - FILTER_MARGIN) / t - total * (1.0 + FILTER_MARGIN)
                }
            })
            .collect();
        let high_stairs = right_to_left_maxima(&tau);
        let high_values: Vec<f64> = high_stairs.iter().map(|&i| tau[i]).collect();
        debug_assert!(high_values.windows(2).all(|p| p[0] <= p[1]));
        let high_index = BucketIndex::new(&high_values);
        let low_tree = MinTree::new(&sigma);
        Summary {
            index: BucketIndex::new(calibration.sorted_scores()),
            calibration,
            q,
            m,
            total,
            entry_of_bucket,
            bucket_max,
            ends,
            counts,
            below,
            tau,
            high_stairs,
            high_values,
            high_index,
            sigma,
            low_tree,
        }
    }

    #[inline]
    fn level(&self, k: usize) -> f64 {
        bh_level(self.q, k, self.m)
    }

    #[inline]
    fn verify_high(&self, w: f64, e: usize) -> bool {
        within_level(self.below[e] + w, self.total + w, self.level(self.ends[e]))
    }

    #[inline]
    fn verify_low(&self, w: f64, e: usize) -> bool {
        within_level(self.below[e], self.total + w, self.level(self.ends[e] + 1))
    }

    /// `K_j` as far as the bucket summary decides it (docs/streaming.md).
    fn decide(&self, score: f64, w: f64) -> Decision {
        self.decide_in(self.bucket_of(score), score, w)
    }

    /// The bucket `#{i : V_i < score}`.
    #[inline]
    fn bucket_of(&self, score: f64) -> usize {
        self.index.below(self.calibration.sorted_scores(), score)
    }

    /// [`Self::decide`] with the unit's bucket already known.
    fn decide_in(&self, bucket: usize, score: f64, w: f64) -> Decision {
        let own = self.entry_of_bucket[bucket] as usize;
        // High region: bucket ends after b_j, which are the later non-empty buckets and the
        // own bucket when a pool score in it lies above this one.
        let lo = if score < self.bucket_max[bucket] {
            own
        } else {
            own + 1
        };
        if lo < self.ends.len() {
            let step = self.high_index.below(&self.high_values, w);
            if let Some(&e) = self.high_stairs.get(step) {
                if e >= lo {
                    let found = if self.verify_high(w, e) {
                        Some(e)
                    } else {
                        e.checked_sub(1).filter(|&hi| hi >= lo).and_then(|hi| {
                            scan_left(lo, hi, |i| self.tau[i] >= w, |i| self.verify_high(w, i))
                        })
                    };
                    if let Some(e) = found {
                        return Decision::Known(self.ends[e]);
                    }
                }
            }
        }
        // Low region, earlier buckets: candidates k = E + 1 for every earlier non-empty bucket.
        let fallback = own
            .checked_sub(1)
            .and_then(|hi| {
                let e = self.low_tree.rightmost_at_most(hi, w)?;
                if self.verify_low(w, e) {
                    Some(e)
                } else {
                    e.checked_sub(1).and_then(|hi| {
                        scan_left(0, hi, |i| self.sigma[i] <= w, |i| self.verify_low(w, i))
                    })
                }
            })
            .map_or(1, |e| self.ends[e] + 1);
        // Low region, own bucket: k = b_j, which beats every earlier candidate; it can pass
        // only if it passes at the bucket end (monotone in k) and the bucket holds >= 2 units.
        if self.counts[own] >= 2
            && within_level(self.below[own], self.total + w, self.level(self.ends[own]))
        {
            Decision::NeedsRank {
                entry: own as u32,
                fallback,
            }
        } else {
            Decision::Known(fallback)
        }
    }

    /// `K_j` of a queued unit from its exact rank `b_j = #{l : Vh_l <= Vh_j}`.
    fn resolve(&self, w: f64, entry: usize, rank: usize, fallback: usize) -> usize {
        let start = self.ends[entry] - self.counts[entry];
        if rank >= start + 2 && within_level(self.below[entry], self.total + w, self.level(rank)) {
            rank
        } else {
            fallback
        }
    }
}

/// A unit queued for its exact rank.
#[derive(Clone, Copy, Debug)]
struct Queued {
    index: u64,
    score: f64,
    weight: f64,
    entry: u32,
    fallback: usize,
    /// `xi_j` (heterogeneous pruning), else unused.
    xi: f64,
}

/// The first-step flag of a ranked unit, in the top bit of its stored `K_j`.
const RANKED_FIRST_STEP: u64 = 1 << 63;

/// `(input index, K_j)` of ranked units, in input order (the first-step flag in
/// [`RANKED_FIRST_STEP`]): in memory up to a budget, then in a temporary file.
struct RankedCounts {
    memory: Vec<(u64, u64)>,
    limit: usize,
    file: Option<BufWriter<File>>,
    in_file: u64,
}

impl RankedCounts {
    fn new(limit: usize) -> Self {
        RankedCounts {
            memory: vec![],
            limit: limit.max(1),
            file: None,
            in_file: 0,
        }
    }

    fn push(&mut self, index: u64, k: u64) -> io::Result<()> {
        if self.file.is_none() && self.memory.len() < self.limit {
            self.memory.push((index, k));
            return Ok(());
        }
        let out = match &mut self.file {
            Some(out) => out,
            None => self
                .file
                .insert(BufWriter::with_capacity(1 << 20, tempfile::tempfile()?)),
        };
        out.write_all(&index.to_le_bytes())?;
        out.write_all(&k.to_le_bytes())?;
        self.in_file += 1;
        Ok(())
    }

    /// A reader over every pair, in the order pushed.
    fn reader(&mut self) -> io::Result<RankedReader<'_>> {
        let file = match self.file.as_mut() {
            Some(out) => {
                out.flush()?;
                let mut file = out.get_ref().try_clone()?;
                file.seek(SeekFrom::Start(0))?;
                Some(BufReader::with_capacity(1 << 20, file))
            }
            None => None,
        };
        Ok(RankedReader {
            memory: &self.memory,
            at: 0,
            file,
            file_left: self.in_file,
        })
    }
}

struct RankedReader<'a> {
    memory: &'a [(u64, u64)],
    at: usize,
    file: Option<BufReader<File>>,
    file_left: u64,
}

impl RankedReader<'_> {
    fn next_pair(&mut self) -> io::Result<Option<(u64, u64)>> {
        if self.at < self.memory.len() {
            self.at += 1;
            return Ok(Some(self.memory[self.at - 1]));
        }
        match &mut self.file {
            Some(reader) if self.file_left > 0 => {
                let mut buf = [0u8; 16];
                reader.read_exact(&mut buf)?;
                self.file_left -= 1;
                Ok(Some((
                    u64::from_le_bytes(buf[..8].try_into().expect("8 bytes")),
                    u64::from_le_bytes(buf[8..].try_into().expect("8 bytes")),
                )))
            }
            _ => Ok(None),
        }
    }
}

/// First-step keys for pruning.
enum PruningKeys {
    /// Homogeneous / deterministic: first-step units per `K` (the key is `xi K`, one `xi`).
    ByCount(BTreeMap<usize, usize>),
    /// Heterogeneous: `xi_j K_j` per first-step unit.
    Keys(Vec<f64>),
}

impl PruningKeys {
    fn add(&mut self, k: usize, xi: f64) {
        match self {
            PruningKeys::ByCount(map) => *map.entry(k).or_insert(0) += 1,
            PruningKeys::Keys(keys) => keys.push(xi * k as f64),
        }
    }

    /// `r* = max{r : #{key <= r} >= r}`, exactly as [`super::pruning::prune`] decides it.
    fn r_star(&mut self, xi: f64) -> usize {
        match self {
            PruningKeys::ByCount(map) => {
                // Keys xi K are nondecreasing in K; within a group of equal K the r-th
                // smallest key is xi K for every r in the group, and "key <= r" is monotone
                // in r, so the largest r passing in a group is its last, C_g.
                let mut cumulative = 0;
                let mut best = 0;
                for (&k, &count) in map.iter() {
                    cumulative += count;
                    if xi * k as f64 <= cumulative as f64 {
                        best = cumulative;
                    }
                }
                best
            }
            PruningKeys::Keys(keys) => {
                keys.sort_by(|a, b| a.total_cmp(b));
                (1..=keys.len())
                    .rev()
                    .find(|&r| keys[r - 1] <= r as f64)
                    .unwrap_or(0)
            }
        }
    }
}

/// The BH count from each unit's first passing rank `r_j` (`k* = max{k : #{r_j <= k} >= k}`,
/// as [`super::bh::benjamini_hochberg`] computes it), from a histogram of blocks of ranks.
struct RankHistogram {
    block: usize,
    /// `m + 1`.
    limit: usize,
    counts: Vec<u64>,
}

impl RankHistogram {
    fn new(m: usize, max_bins: usize) -> Self {
        let block = m.div_ceil(max_bins.max(1)).max(1);
        RankHistogram {
            block,
            limit: m + 1,
            counts: vec![0; m.div_ceil(block)],
        }
    }

    #[inline]
    fn add(&mut self, rank: usize) {
        // rank in 1..=m+1; m + 1 means the p-value passes at no rank.
        if rank < self.limit {
            self.counts[(rank - 1) / self.block] += 1;
        }
    }

    /// [`Self::add`] for a chunk's ranks at once, in increasing order: the counts (8 bytes
    /// per rank, 80 MB at 10^7 units) are then touched front to back once per chunk instead
    /// of at random. `ranks` is left sorted.
    fn add_all(&mut self, ranks: &mut [usize]) {
        ranks.sort_unstable();
        for &rank in ranks.iter() {
            self.add(rank);
        }
    }
}

/// A streamed selection after its passes: counts, and [`Self::for_each_unit`] for the
/// per-unit results.
pub struct StreamingSelection<'c> {
    summary: Summary<'c>,
    options: StreamingOptions,
    ranked: RankedCounts,
    xi: f64,
    r_star: usize,
    bh_count: usize,
    pub counts: StreamingSummary,
}

/// Run the passes of a streamed conditional calibration (and the BH count) over `pool`.
///
/// # Errors
/// `q` outside (0, 1], NaN scores, weights that are not finite and positive, an empty or
/// changing pool, I/O errors of the source or the temporary files.
pub fn run_streaming<'c>(
    calibration: &'c CalibrationSet,
    pool: &mut dyn PoolSource,
    options: StreamingOptions,
) -> Result<StreamingSelection<'c>, StreamingError> {
    run_streaming_visiting(calibration, pool, options, |_, _| {})
}

/// [`run_streaming`], handing every unit's [`EarlyUnit`] to `visit` in input order during
/// the decide pass: `visit(j, units)` with `units[i]` the results of unit `j + i`. A
/// chunk's `visit` comes one chunk late: after the pool has handed out the next chunk (the
/// last chunk's, after the pass), so a visitor reading the pool's own records must keep
/// the last two chunks.
///
/// # Errors
/// As [`run_streaming`].
pub fn run_streaming_visiting<'c>(
    calibration: &'c CalibrationSet,
    pool: &mut dyn PoolSource,
    options: StreamingOptions,
    visit: impl FnMut(u64, &[EarlyUnit]),
) -> Result<StreamingSelection<'c>, StreamingError> {
    check_fdr(options.q)?;

    // Pass 1: bucket histogram and largest score per bucket; checks.
    let buckets = PoolBuckets::new(calibration);
    let mut histogram = PoolHistogram::new(calibration);
    pool.pass(&mut |scores, weights| {
        let of_chunk: Vec<u32> = scores
            .par_chunks(4096)
            .flat_map_iter(|part| buckets.of(part))
            .collect();
        histogram.add(scores, weights, &of_chunk);
    })?;
    decide_from_histogram(calibration, histogram, pool, options, visit, 2)
}

/// `#{i : V_i < s}`, a pool score's bucket among the labeled scores (0..=n), for
/// [`PoolHistogram`]; shared by the threads that compute it.
pub struct PoolBuckets<'c> {
    index: BucketIndex,
    labeled: &'c [f64],
}

impl<'c> PoolBuckets<'c> {
    /// The buckets of `calibration`'s sorted labeled scores.
    pub fn new(calibration: &'c CalibrationSet) -> Self {
        let labeled = calibration.sorted_scores();
        PoolBuckets {
            index: BucketIndex::new(labeled),
            labeled,
        }
    }

    /// The bucket of each score.
    pub fn of(&self, scores: &[f64]) -> Vec<u32> {
        scores
            .iter()
            .map(|&s| self.index.below(self.labeled, s) as u32)
            .collect()
    }
}

/// The selection's first pass, the bucket histogram and the largest pool score per bucket,
/// built by the caller while it reads the pool for its own purposes (then
/// [`run_streaming_with_histogram`] needs one pass over the pool fewer).
pub struct PoolHistogram {
    bucket_count: Vec<u64>,
    bucket_max: Vec<f64>,
    seen: u64,
    failure: Option<SelectionError>,
}

impl PoolHistogram {
    /// An empty histogram over `calibration`'s `n + 1` buckets.
    pub fn new(calibration: &CalibrationSet) -> Self {
        let n = calibration.sorted_scores().len();
        PoolHistogram {
            bucket_count: vec![0; n + 1],
            bucket_max: vec![f64::NEG_INFINITY; n + 1],
            seen: 0,
            failure: None,
        }
    }

    /// Add the next units in input order: scores, weights (`None` = every weight 1) and
    /// buckets ([`PoolBuckets::of`] of the scores). A NaN score or a weight that is not
    /// finite and positive is kept as the error the selection then returns.
    ///
    /// # Panics
    /// When `buckets` and `scores` differ in length.
    pub fn add(&mut self, scores: &[f64], weights: Option<&[f64]>, buckets: &[u32]) {
        if self.failure.is_some() {
            return;
        }
        let seen = self.seen as usize;
        if let Some(i) = scores.iter().position(|v| v.is_nan()) {
            self.failure = Some(SelectionError::NanPoolScore { index: seen + i });
            return;
        }
        if let Some(w) = weights {
            if let Some(i) = w.iter().position(|w| !(w.is_finite() && *w > 0.0)) {
                self.failure = Some(SelectionError::PValue(PValueError::BadWeight {
                    what: "pool",
                    index: seen + i,
                    value: w[i],
                }));
                return;
            }
        }
        assert_eq!(buckets.len(), scores.len(), "a bucket per score");
        for (&b, &s) in buckets.iter().zip(scores) {
            self.bucket_count[b as usize] += 1;
            if s > self.bucket_max[b as usize] {
                self.bucket_max[b as usize] = s;
            }
        }
        self.seen += scores.len() as u64;
    }
}

/// [`run_streaming_visiting`] with the first pass done by the caller: `histogram` holds
/// every unit of `pool`, added in input order. `counts.passes` then counts this
/// function's passes only, not the caller's read.
///
/// # Errors
/// As [`run_streaming`]; also the pool changing from the one the histogram saw.
pub fn run_streaming_with_histogram<'c>(
    calibration: &'c CalibrationSet,
    histogram: PoolHistogram,
    pool: &mut dyn PoolSource,
    options: StreamingOptions,
    visit: impl FnMut(u64, &[EarlyUnit]),
) -> Result<StreamingSelection<'c>, StreamingError> {
    decide_from_histogram(calibration, histogram, pool, options, visit, 1)
}

/// The passes after the histogram; `passes` counts those done so far, this one included.
fn decide_from_histogram<'c>(
    calibration: &'c CalibrationSet,
    histogram: PoolHistogram,
    pool: &mut dyn PoolSource,
    options: StreamingOptions,
    mut visit: impl FnMut(u64, &[EarlyUnit]),
    mut passes: usize,
) -> Result<StreamingSelection<'c>, StreamingError> {
    let q = check_fdr(options.q)?;
    let labeled = calibration.sorted_scores();
    let total = calibration.total_weight();
    let PoolHistogram {
        bucket_count,
        bucket_max,
        seen,
        failure,
    } = histogram;
    if let Some(e) = failure {
        return Err(e.into());
    }
    if seen == 0 {
        return Err(StreamingError::EmptyPool);
    }
    let m = seen as usize;
    let summary = Summary::new(calibration, q, &bucket_count, bucket_max);
    drop(bucket_count);

    // Budget shares: queued units, the rank histogram, ranked counts kept in memory.
    let budget = options.memory_budget.max(1024);
    let queue_cap = (budget / 2 / std::mem::size_of::<Queued>()).max(1);
    let mut bh_hist = RankHistogram::new(m, budget / 4 / 8);
    let mut ranked = RankedCounts::new(budget / 4 / 16);

    let mut pruning_rng = stream(options.seed, Stream::Pruning);
    let xi = match options.pruning {
        Pruning::Homogeneous => pruning_rng.gen::<f64>(),
        _ => 1.0,
    };
    let mut keys = match options.pruning {
        Pruning::Heterogeneous => PruningKeys::Keys(vec![]),
        _ => PruningKeys::ByCount(BTreeMap::new()),
    };
    let mut first_step_count = 0usize;
    let mut unreachable_count = 0usize;
    let mut floor_count = 0usize;
    let lowest = labeled[0];

    // Pass 2: decide every unit; queue those that need their rank (up to queue_cap).
    let mut queue: Vec<Queued> = Vec::new();
    let mut unqueued_from: Option<u64> = None; // first queued-but-not-held unit
    let mut ties_rng = stream(options.seed, Stream::PValueTies);
    let mut early: Vec<EarlyUnit> = Vec::with_capacity(CHUNK);
    let mut chunk_ranks: Vec<usize> = Vec::with_capacity(CHUNK);
    let conservative = options.bh_pvalues == PValueKind::Conservative;
    // The bookkeeping of one decided chunk, in input order: counts, draws, queue, visit.
    let mut book = |chunk: DecidedChunk| {
        let DecidedChunk {
            index,
            scores,
            weights,
            decided,
        } = chunk;
        early.clear();
        for (offset, (&s, d)) in scores.iter().zip(&decided).enumerate() {
            let w = weights.as_ref().map_or(1.0, |w| w[offset]);
            let j = index + offset as u64;
            let xi_j = match options.pruning {
                Pruning::Heterogeneous => pruning_rng.gen::<f64>(),
                _ => xi,
            };
            let rank = if conservative {
                d.conservative_rank
            } else {
                let u: f64 = ties_rng.gen();
                first_passing_rank(
                    (d.below + u * (w + (d.at_or_below - d.below))) / (total + w),
                    q,
                    m,
                )
            };
            if rank < bh_hist.limit {
                chunk_ranks.push(rank);
            }
            unreachable_count += usize::from(d.unreachable);
            floor_count += usize::from(s < lowest);
            let mut unit = EarlyUnit {
                conditional_count: None,
                first_step: false,
                numerator: d.at_or_below + w,
                denominator: total + w,
                xi: xi_j,
            };
            match d.decision {
                Decision::Known(k) => {
                    unit.conditional_count = Some(k);
                    if d.first_step {
                        first_step_count += 1;
                        keys.add(k, xi_j);
                        unit.first_step = true;
                    }
                }
                Decision::NeedsRank { entry, fallback } => {
                    if unqueued_from.is_none() && queue.len() < queue_cap {
                        queue.push(Queued {
                            index: j,
                            score: s,
                            weight: w,
                            entry,
                            fallback,
                            xi: xi_j,
                        });
                    } else if unqueued_from.is_none() {
                        unqueued_from = Some(j);
                    }
                }
            }
            early.push(unit);
        }
        bh_hist.add_all(&mut chunk_ranks);
        chunk_ranks.clear();
        visit(index, &early);
    };
    // Each chunk's decisions (decide_chunk, in parallel) are made on a helper thread while
    // this thread books the chunk before it, so the bookkeeping does not leave the cores
    // idle; `visit` for a chunk therefore comes after the pool has handed out the next.
    let mut index = 0u64;
    let mut pending: Option<DecidedChunk> = None;
    pool.pass(&mut |scores, weights| {
        let decided = std::thread::scope(|scope| {
            let deciding = scope.spawn(|| decide_chunk(&summary, scores, weights, conservative));
            if let Some(chunk) = pending.take() {
                book(chunk);
            }
            deciding
                .join()
                .unwrap_or_else(|panic| std::panic::resume_unwind(panic))
        });
        pending = Some(DecidedChunk {
            index,
            scores: scores.to_vec(),
            weights: weights.map(<[f64]>::to_vec),
            decided,
        });
        index += scores.len() as u64;
    })?;
    if let Some(chunk) = pending.take() {
        book(chunk);
    }
    check_same(m, index)?;

    // Rank rounds: rank the queue, then collect the next part of the queue if any.
    let mut ranked_units = 0usize;
    loop {
        if !queue.is_empty() {
            passes += 1;
            let ranks = rank_pass(pool, &queue, m)?;
            for (unit, &rank) in queue.iter().zip(&ranks) {
                let k = summary.resolve(unit.weight, unit.entry as usize, rank, unit.fallback);
                let at_or_below = calibration.weight_at_or_below(unit.score);
                let first_step = within_level(
                    at_or_below + unit.weight,
                    total + unit.weight,
                    bh_level(q, k, m),
                );
                if first_step {
                    first_step_count += 1;
                    keys.add(k, unit.xi);
                }
                ranked.push(
                    unit.index,
                    k as u64 | if first_step { RANKED_FIRST_STEP } else { 0 },
                )?;
            }
            ranked_units += queue.len();
            queue.clear();
        }
        let Some(from) = unqueued_from.take() else {
            break;
        };
        passes += 1;
        collect_pass(
            pool,
            &summary,
            options.pruning,
            options.seed,
            from,
            queue_cap,
            &mut queue,
            &mut unqueued_from,
        )?;
    }

    let r_star = keys.r_star(xi);
    let bh_count = bh_count_from(&mut bh_hist, pool, &summary, options, &mut passes)?;
    Ok(StreamingSelection {
        counts: StreamingSummary {
            m,
            first_step_count,
            selected_count: r_star,
            pruning_draw: (options.pruning == Pruning::Homogeneous).then_some(xi),
            bh_selected_count: bh_count,
            unreachable_count,
            floor_count,
            ranked_units,
            passes,
            spilled: ranked.file.is_some(),
        },
        summary,
        options,
        ranked,
        xi,
        r_star,
        bh_count,
    })
}

fn check_same(m: usize, later: u64) -> Result<(), StreamingError> {
    if later as usize == m {
        Ok(())
    } else {
        Err(StreamingError::Changed {
            first: m as u64,
            later,
        })
    }
}

/// Per-unit work of a chunk that needs no sequential state, in parallel.
struct Decided {
    decision: Decision,
    below: f64,
    at_or_below: f64,
    /// `p_j <= q K_j / m` for a known `K_j` (false otherwise).
    first_step: bool,
    /// The first rank at which the conservative p-value passes BH's line (when asked).
    conservative_rank: usize,
    /// The p-value floor `w / (W + w)` is above `q`.
    unreachable: bool,
}

/// A chunk of the decide pass with its units' decisions, waiting for its bookkeeping.
struct DecidedChunk {
    /// Input index of the chunk's first unit.
    index: u64,
    scores: Vec<f64>,
    weights: Option<Vec<f64>>,
    decided: Vec<Decided>,
}

/// Decide a chunk's units; `conservative_ranks` asks for the conservative p-values' first
/// passing ranks.
fn decide_chunk(
    summary: &Summary<'_>,
    scores: &[f64],
    weights: Option<&[f64]>,
    conservative_ranks: bool,
) -> Vec<Decided> {
    let cal = summary.calibration;
    let labeled = cal.sorted_scores();
    let (q, m, total) = (summary.q, summary.m, summary.total);
    scores
        .par_iter()
        .enumerate()
        .map(|(i, &s)| {
            let w = weights.map_or(1.0, |w| w[i]);
            // #{V_i < s} is the bucket, #{V_i <= s} adds the labeled scores equal to s
            // (both within s's cell of the grid). The same counts as weight_below and
            // weight_at_or_below, so the same prefix sums.
            let (bucket, at_or_below) = summary.index.below_and_at_or_below(labeled, s);
            let decision = summary.decide_in(bucket, s, w);
            let at_or_below = cal.prefix_weight(at_or_below);
            let (numerator, denominator) = (at_or_below + w, total + w);
            Decided {
                first_step: matches!(decision, Decision::Known(k)
                    if within_level(numerator, denominator, bh_level(q, k, m))),
                conservative_rank: if conservative_ranks {
                    first_passing_rank(numerator / denominator, q, m)
                } else {
                    0
                },
                unreachable: !within_level(w, denominator, q),
                decision,
                below: cal.prefix_weight(bucket),
                at_or_below,
            }
        })
        .collect()
}

/// Exact ranks `#{l : Vh_l <= score}` of the queued units, by one pass.
fn rank_pass(
    pool: &mut dyn PoolSource,
    queue: &[Queued],
    m: usize,
) -> Result<Vec<usize>, StreamingError> {
    let mut values: Vec<f64> = queue.iter().map(|u| u.score).collect();
    values.sort_by(|a, b| a.total_cmp(b));
    values.dedup();
    let mut at_or_above = vec![0u64; values.len() + 1];
    let mut seen = 0u64;
    pool.pass(&mut |scores, _| {
        for &s in scores {
            // s <= values[i] exactly for i >= the first value not below s.
            at_or_above[values.partition_point(|&v| v < s)] += 1;
        }
        seen += scores.len() as u64;
    })?;
    check_same(m, seen)?;
    let mut cumulative = 0u64;
    let rank_of: Vec<usize> = at_or_above[..values.len()]
        .iter()
        .map(|&c| {
            cumulative += c;
            cumulative as usize
        })
        .collect();
    Ok(queue
        .iter()
        .map(|u| rank_of[values.partition_point(|&v| v < u.score)])
        .collect())
}

/// Collect the queued units from input index `from` onwards (up to `cap`), redoing their
/// decisions; the first one beyond the cap goes to `unqueued_from`.
#[allow(clippy::too_many_arguments)]
fn collect_pass(
    pool: &mut dyn PoolSource,
    summary: &Summary<'_>,
    pruning: Pruning,
    seed: u64,
    from: u64,
    cap: usize,
    queue: &mut Vec<Queued>,
    unqueued_from: &mut Option<u64>,
) -> Result<(), StreamingError> {
    let mut pruning_rng = stream(seed, Stream::Pruning);
    if pruning == Pruning::Heterogeneous {
        // One f64 = two 32-bit words per unit (as randomized_pvalues relies on).
        pruning_rng.set_word_pos(2 * u128::from(from));
    }
    let mut index = 0u64;
    pool.pass(&mut |scores, weights| {
        let end = index + scores.len() as u64;
        if end <= from || unqueued_from.is_some() {
            index = end;
            return;
        }
        let skip = from.saturating_sub(index) as usize;
        for (offset, &s) in scores.iter().enumerate().skip(skip) {
            let w = weights.map_or(1.0, |w| w[offset]);
            let xi_j = if pruning == Pruning::Heterogeneous {
                pruning_rng.gen::<f64>()
            } else {
                1.0
            };
            if let Decision::NeedsRank { entry, fallback } = summary.decide(s, w) {
                if queue.len() < cap {
                    queue.push(Queued {
                        index: index + offset as u64,
                        score: s,
                        weight: w,
                        entry,
                        fallback,
                        xi: xi_j,
                    });
                } else {
                    *unqueued_from = Some(index + offset as u64);
                    break;
                }
            }
        }
        index = end;
    })?;
    check_same(summary.m, index)
}

/// The BH count from the rank histogram; when its blocks hold more than one rank, exact
/// passes over the candidate blocks, highest first.
fn bh_count_from(
    hist: &mut RankHistogram,
    pool: &mut dyn PoolSource,
    summary: &Summary<'_>,
    options: StreamingOptions,
    passes: &mut usize,
) -> Result<usize, StreamingError> {
    let m = summary.m;
    let block = hist.block;
    let blocks = m.div_ceil(block);
    // cumulative[b] = #{r_j <= end of block b}.
    let mut cumulative = Vec::with_capacity(blocks);
    let mut running = 0u64;
    for &c in &hist.counts {
        running += c;
        cumulative.push(running as usize);
    }
    let block_end = |b: usize| ((b + 1) * block).min(m);
    if block == 1 {
        return Ok((1..=m).rev().find(|&k| cumulative[k - 1] >= k).unwrap_or(0));
    }
    // Exact at block ends; a solution inside block b needs #{r <= end} >= start.
    let known = (0..blocks)
        .rev()
        .find(|&b| cumulative[b] >= block_end(b))
        .map_or(0, block_end);
    let mut candidates: Vec<usize> = (0..blocks)
        .rev()
        .take_while(|&b| block_end(b) > known)
        .filter(|&b| cumulative[b] > b * block)
        .collect();
    let bins_per_pass = (options.memory_budget / 4 / 8).max(block);
    while !candidates.is_empty() {
        let take = (bins_per_pass / block).clamp(1, candidates.len());
        let group: Vec<usize> = candidates.drain(..take).collect();
        *passes += 1;
        let fine = fine_ranks(pool, summary, options, &group, block)?;
        for (g, &b) in group.iter().enumerate() {
            let start = b * block; // ranks start+1 ..= block_end(b)
            let mut count = if b == 0 { 0 } else { cumulative[b - 1] };
            let mut best = None;
            for (offset, &c) in fine[g].iter().enumerate() {
                count += c as usize;
                let k = start + offset + 1;
                if k <= m && count >= k {
                    best = Some(k);
                }
            }
            if let Some(k) = best {
                return Ok(k);
            }
        }
    }
    Ok(known)
}

/// Exact counts per rank within the given blocks, by one pass recomputing the p-values.
fn fine_ranks(
    pool: &mut dyn PoolSource,
    summary: &Summary<'_>,
    options: StreamingOptions,
    group: &[usize],
    block: usize,
) -> Result<Vec<Vec<u32>>, StreamingError> {
    let (q, m, total, cal) = (summary.q, summary.m, summary.total, summary.calibration);
    let mut fine = vec![vec![0u32; block]; group.len()];
    let slot: BTreeMap<usize, usize> = group.iter().enumerate().map(|(g, &b)| (b, g)).collect();
    let mut ties_rng = stream(options.seed, Stream::PValueTies);
    let mut seen = 0u64;
    pool.pass(&mut |scores, weights| {
        for (i, &s) in scores.iter().enumerate() {
            let w = weights.map_or(1.0, |w| w[i]);
            let at_or_below = cal.weight_at_or_below(s);
            let p = match options.bh_pvalues {
                PValueKind::Conservative => (at_or_below + w) / (total + w),
                PValueKind::Randomized => {
                    let below = cal.weight_below(s);
                    let u: f64 = ties_rng.gen();
                    (below + u * (w + (at_or_below - below))) / (total + w)
                }
            };
            let rank = first_passing_rank(p, q, m);
            if rank <= m {
                if let Some(&g) = slot.get(&((rank - 1) / block)) {
                    fine[g][(rank - 1) % block] += 1;
                }
            }
        }
        seen += scores.len() as u64;
    })?;
    check_same(m, seen)?;
    Ok(fine)
}

/// Pruning keeps a first-step unit when its key `xi_j K_j` is at most `r*`.
#[inline]
fn in_shortlist(first_step: bool, k: usize, xi: f64, r_star: usize) -> bool {
    first_step && xi * k as f64 <= r_star as f64
}

impl StreamingSelection<'_> {
    /// `r*`.
    pub fn r_star(&self) -> usize {
        self.r_star
    }

    /// The units whose `K_j` needed their exact rank, in input order: `(j, K_j, first
    /// step)`. With the [`EarlyUnit`]s of [`run_streaming_visiting`] this completes every
    /// unit's `K_j` and first step without another pass over the pool.
    ///
    /// # Errors
    /// Reading the temporary file of ranked units fails.
    pub fn for_each_ranked(
        &mut self,
        mut visit: impl FnMut(u64, usize, bool),
    ) -> Result<(), StreamingError> {
        let mut ranked = self.ranked.reader()?;
        while let Some((j, packed)) = ranked.next_pair()? {
            visit(
                j,
                (packed & !RANKED_FIRST_STEP) as usize,
                packed & RANKED_FIRST_STEP != 0,
            );
        }
        Ok(())
    }

    /// Whether a unit with first step `first_step`, `K_j = k` and pruning draw `xi` (its
    /// [`EarlyUnit::xi`]) is in the shortlist: the rule of [`Self::for_each_unit`].
    #[inline]
    pub fn selects(&self, first_step: bool, k: usize, xi: f64) -> bool {
        in_shortlist(first_step, k, xi, self.r_star)
    }

    /// The pruning draw every unit shares (homogeneous and deterministic pruning, where it
    /// is 1); `None` under heterogeneous pruning, whose draws are per unit.
    pub fn shared_xi(&self) -> Option<f64> {
        (self.options.pruning != Pruning::Heterogeneous).then_some(self.xi)
    }

    /// The last pass: every unit's results in input order.
    ///
    /// # Errors
    /// Reading the pool or the temporary file fails; the pool changed.
    pub fn for_each_unit(
        &mut self,
        pool: &mut dyn PoolSource,
        mut visit: impl FnMut(u64, UnitResult),
    ) -> Result<(), StreamingError> {
        let summary = &self.summary;
        let options = self.options;
        let (q, m, total) = (summary.q, summary.m, summary.total);
        let (xi, r_star, bh_count) = (self.xi, self.r_star, self.bh_count);
        let mut ranked = self.ranked.reader()?;
        let mut next_ranked = ranked.next_pair()?;
        let mut pruning_rng = stream(options.seed, Stream::Pruning);
        let mut ties_rng = stream(options.seed, Stream::PValueTies);
        let mut index = 0u64;
        let mut failure: Option<io::Error> = None;
        pool.pass(&mut |scores, weights| {
            if failure.is_some() {
                return;
            }
            let decided = decide_chunk(summary, scores, weights, false);
            for (offset, d) in decided.iter().enumerate() {
                let w = weights.map_or(1.0, |w| w[offset]);
                let j = index + offset as u64;
                let xi_j = match options.pruning {
                    Pruning::Heterogeneous => pruning_rng.gen::<f64>(),
                    _ => xi,
                };
                let k = match d.decision {
                    Decision::Known(k) => k,
                    Decision::NeedsRank { .. } => match next_ranked {
                        Some((at, k)) if at == j => {
                            let k = k & !RANKED_FIRST_STEP;
                            next_ranked = match ranked.next_pair() {
                                Ok(next) => next,
                                Err(e) => {
                                    failure = Some(e);
                                    return;
                                }
                            };
                            k as usize
                        }
                        _ => {
                            failure = Some(io::Error::other("ranked units out of step"));
                            return;
                        }
                    },
                };
                let numerator = d.at_or_below + w;
                let denominator = total + w;
                let first_step = within_level(numerator, denominator, bh_level(q, k, m));
                let selected = in_shortlist(first_step, k, xi_j, r_star);
                let p = match options.bh_pvalues {
                    PValueKind::Conservative => numerator / denominator,
                    PValueKind::Randomized => {
                        let u: f64 = ties_rng.gen();
                        (d.below + u * (w + (d.at_or_below - d.below))) / denominator
                    }
                };
                let bh_selected = first_passing_rank(p, q, m) <= bh_count;
                visit(
                    j,
                    UnitResult {
                        conditional_count: k,
                        first_step,
                        selected,
                        bh_selected,
                        numerator,
                        denominator,
                    },
                );
            }
            index += scores.len() as u64;
        })?;
        if let Some(e) = failure {
            return Err(e.into());
        }
        check_same(m, index)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bucket_index_counts_as_a_binary_search_of_the_whole_array() {
        use rand::{Rng, SeedableRng};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let inf = f64::INFINITY;
        let mut sets: Vec<Vec<f64>> = vec![
            vec![],
            vec![1.0],
            vec![2.0; 50],
            vec![-inf, -inf, 0.0, inf, inf],
            vec![inf; 5],
            vec![-inf, inf],
            vec![0.0, f64::MIN_POSITIVE * 1e-10, f64::MIN_POSITIVE],
            vec![-1e300, -1.0, 0.0, 1e-300, 1.0, 1e300],
            vec![-f64::MAX, f64::MAX],
            (0..1000).map(|i| f64::from(i / 7) * 0.001).collect(),
        ];
        for _ in 0..20 {
            let n = rng.gen_range(1..3000);
            let spread = 10f64.powi(rng.gen_range(-8..8));
            let mut v: Vec<f64> = (0..n)
                .map(|_| {
                    let x: f64 = rng.gen::<f64>() - 0.5;
                    // Heavy tail and a grid, so that cells hold very different counts.
                    (x.powi(5) * spread * 1e3).round() / 1e3
                })
                .collect();
            if rng.gen_bool(0.3) {
                v.push(inf);
            }
            v.sort_by(f64::total_cmp);
            sets.push(v);
        }
        for sorted in &sets {
            let index = BucketIndex::new(sorted);
            let mut queries: Vec<f64> = vec![-inf, inf, 0.0, -0.0, f64::MAX, -f64::MAX];
            for &v in sorted {
                queries.extend([v, v.next_up(), v.next_down()]);
            }
            for _ in 0..200 {
                let a = sorted.first().copied().unwrap_or(0.0).max(-1e308);
                let b = sorted.last().copied().unwrap_or(1.0).min(1e308);
                queries.push(a + (b - a) * rng.gen::<f64>());
            }
            for s in queries {
                let below = sorted.partition_point(|&v| v < s);
                assert_eq!(
                    index.below(sorted, s),
                    below,
                    "query {s:e} in {} values",
                    sorted.len()
                );
                assert_eq!(
                    index.below_and_at_or_below(sorted, s),
                    (below, sorted.partition_point(|&v| v <= s)),
                    "query {s:e} in {} values: at or below",
                    sorted.len()
                );
            }
        }
    }

    #[test]
    fn min_tree_finds_the_rightmost_passing_index() {
        use rand::{Rng, SeedableRng};
        let check = |values: &[f64], xs: &[f64]| {
            let tree = MinTree::new(values);
            for hi in 0..values.len() {
                for &x in xs {
                    let expected = (0..=hi).rev().find(|&i| values[i] <= x);
                    assert_eq!(
                        tree.rightmost_at_most(hi, x),
                        expected,
                        "hi {hi} x {x} in {values:?}"
                    );
                }
            }
        };
        let xs: Vec<f64> = (0..10).map(f64::from).collect();
        check(&[3.0, 1.0, 4.0, 1.0, 5.0, 9.0, 2.0], &xs);
        // Every size up to 70 (powers of two and the ones past them), with infinite values
        // and queries: the brute-force scan is the reference.
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(11);
        let (inf, ninf) = (f64::INFINITY, f64::NEG_INFINITY);
        for len in 1..=70 {
            let values: Vec<f64> = (0..len)
                .map(|_| match rng.gen_range(0..10) {
                    0 => inf,
                    1 => ninf,
                    _ => f64::from(rng.gen_range(0..20)),
                })
                .collect();
            let xs: Vec<f64> = [ninf, inf, -1.0, 0.0, 0.5, 7.0, 19.0, 25.0].to_vec();
            check(&values, &xs);
        }
    }

    #[test]
    fn grouped_pruning_keys_match_the_sorted_keys() {
        // Homogeneous keys xi K for K = 1, 2, 2, 5 with xi = 0.5: 0.5, 1, 1, 2.5;
        // r = 3: the 3rd key 1 <= 3; r = 4: 2.5 <= 4, so r* = 4.
        let mut keys = PruningKeys::ByCount(BTreeMap::new());
        for k in [2, 5, 1, 2] {
            keys.add(k, 0.5);
        }
        assert_eq!(keys.r_star(0.5), 4);
        let mut keys = PruningKeys::ByCount(BTreeMap::new());
        for k in [2, 5, 1, 2] {
            keys.add(k, 1.0);
        }
        // Keys 1, 2, 2, 5 with xi = 1: r = 3 passes, r = 4 does not (pruning.rs's example).
        assert_eq!(keys.r_star(1.0), 3);
    }

    #[test]
    fn spilled_pool_reads_back_what_was_written() {
        let mut w = SpillWriter::new(None, true).unwrap();
        for i in 0..(CHUNK + 5) {
            w.push(i as f64 * 0.5, 1.0 + i as f64).unwrap();
        }
        let mut pool = w.finish().unwrap();
        for _ in 0..2 {
            let mut got = 0usize;
            pool.pass(&mut |s, w| {
                for (i, &x) in s.iter().enumerate() {
                    assert_eq!(x, (got + i) as f64 * 0.5);
                    assert_eq!(w.unwrap()[i], 1.0 + (got + i) as f64);
                }
                got += s.len();
            })
            .unwrap();
            assert_eq!(got, CHUNK + 5);
        }
    }
}
