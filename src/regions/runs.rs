//! Runs of samples above a threshold, row by row, and their joining into
//! connected components (see the module above for the conventions).

use rayon::prelude::*;

use super::Connectivity;

/// One run: row, first and one-past-last column.
#[derive(Debug, Clone, Copy)]
pub(super) struct Run {
    pub(super) row: u32,
    pub(super) start: u32,
    pub(super) end: u32,
}

/// Runs of `above` per row over columns [c0, c1) of rows [r0, r1), rows in
/// order. Each row becomes a bit mask, 64 samples a word, and runs are read
/// off the mask's 0→1 and 1→0 transitions with bit operations: the work
/// follows the number of runs, and a noisy map (an orientation's, half of it
/// above) costs no mispredicted branch per sample. Two parallel passes over
/// bands of rows: the masks and each band's count of runs (a popcount of its
/// transitions), then every band writes its runs into its own part of one
/// vector sized exactly, so no vector grows or is copied.
pub(super) fn runs_of<T: Copy + Sync, F: Fn(T) -> bool + Sync>(
    values: &[T],
    w: usize,
    (r0, r1): (usize, usize),
    (c0, c1): (usize, usize),
    above: F,
) -> Vec<Run> {
    let rows = r1.saturating_sub(r0);
    let cols = c1.saturating_sub(c0);
    let per_row = cols.div_ceil(64);
    let band = (1usize << 16).div_ceil(w.max(1)).max(1);
    let mut masks = vec![0u64; rows * per_row];
    // Pass one: masks, and the runs of each band.
    let counts: Vec<usize> = masks
        .par_chunks_mut((band * per_row).max(1))
        .enumerate()
        .map(|(b, words)| {
            let mut n = 0;
            for (i, row_words) in words.chunks_mut(per_row.max(1)).enumerate() {
                let r = r0 + b * band + i;
                let row = &values[r * w + c0..r * w + c0 + cols];
                let mut carry = 0u64;
                for (m, chunk) in row_words.iter_mut().zip(row.chunks(64)) {
                    *m = mask_word(chunk, &above);
                    n += (*m ^ ((*m << 1) | carry)).count_ones() as usize;
                    carry = *m >> 63;
                }
                // A run open at the end of the row ends there.
                n += carry as usize;
            }
            n / 2
        })
        .collect();
    let total: usize = counts.iter().sum();
    let mut runs = vec![
        Run {
            row: 0,
            start: 0,
            end: 0
        };
        total
    ];
    let mut parts: Vec<&mut [Run]> = Vec::with_capacity(counts.len());
    let mut rest: &mut [Run] = &mut runs;
    for &n in &counts {
        let (part, tail) = rest.split_at_mut(n);
        parts.push(part);
        rest = tail;
    }
    // Pass two: each band's runs into its part.
    parts
        .into_par_iter()
        .zip(masks.par_chunks((band * per_row).max(1)))
        .enumerate()
        .for_each(|(b, (out, words))| {
            let mut at = 0;
            for (i, row_words) in words.chunks(per_row.max(1)).enumerate() {
                let r = (r0 + b * band + i) as u32;
                let mut carry = 0u64;
                let mut open: Option<usize> = None;
                for (k, &m) in row_words.iter().enumerate() {
                    // Bit i of `before` is the sample before position i; the
                    // transitions alternate: a run's start, its end, the next start…
                    let mut t = m ^ ((m << 1) | carry);
                    while t != 0 {
                        let p = k * 64 + t.trailing_zeros() as usize;
                        t &= t - 1;
                        match open.take() {
                            None => open = Some(p),
                            Some(s) => {
                                out[at] = Run {
                                    row: r,
                                    start: (c0 + s) as u32,
                                    end: (c0 + p) as u32,
                                };
                                at += 1;
                            }
                        }
                    }
                    carry = m >> 63;
                }
                if let Some(s) = open {
                    out[at] = Run {
                        row: r,
                        start: (c0 + s) as u32,
                        end: (c0 + cols) as u32,
                    };
                    at += 1;
                }
            }
            debug_assert_eq!(at, out.len());
        });
    runs
}

/// Bit i of the word is `above(chunk[i])` (a chunk of at most 64). The
/// comparisons go to bytes (a loop that vectorises), and each 8 bytes of 0/1
/// are packed into 8 bits by one multiplication: with bytes b₀…b₇, the top
/// byte of x·0x0102040810204080 is Σ bᵢ·2ⁱ (no carries cross, as each
/// partial sum is at most 1). Checked against the plain rule in the tests.
#[inline]
fn mask_word<T: Copy, F: Fn(T) -> bool>(chunk: &[T], above: &F) -> u64 {
    let mut bytes = [0u8; 64];
    for (b, v) in bytes.iter_mut().zip(chunk) {
        *b = u8::from(above(*v));
    }
    let mut m = 0u64;
    for (k, eight) in bytes.chunks_exact(8).enumerate() {
        let x = u64::from_le_bytes(eight.try_into().expect("eight bytes"));
        m |= (x.wrapping_mul(0x0102_0408_1020_4080) >> 56) << (8 * k);
    }
    m
}

fn find(parent: &mut [u32], mut i: u32) -> u32 {
    while parent[i as usize] != i {
        let p = parent[i as usize];
        parent[i as usize] = parent[p as usize];
        i = p;
    }
    i
}

/// Joins runs of neighbouring rows that touch; gives each run's component
/// root, roots being the component's first run in raster order.
///
/// Bands of rows are joined in parallel, each in its own part of the parent
/// array (its runs' links stay inside it), then the rows where bands meet are
/// joined, and every run's root is read off without changing the array.
pub(super) fn join(runs: &[Run], conn: Connectivity) -> Vec<u32> {
    let mut parent: Vec<u32> = (0..runs.len() as u32).collect();
    let reach = u32::from(conn == Connectivity::Eight);
    // Band starts: run indices where a row begins, about evenly spaced.
    let parts = rayon::current_num_threads().max(1) * 4;
    let mut starts = vec![0usize];
    for k in 1..parts {
        let mut i = runs.len() * k / parts;
        while i > 0 && i < runs.len() && runs[i].row == runs[i - 1].row {
            i += 1;
        }
        if i < runs.len() && i > *starts.last().expect("one start") {
            starts.push(i);
        }
    }
    starts.push(runs.len());
    {
        let mut pieces: Vec<(usize, &mut [u32])> = Vec::new();
        let mut rest: &mut [u32] = &mut parent;
        for w in starts.windows(2) {
            let (piece, tail) = rest.split_at_mut(w[1] - w[0]);
            pieces.push((w[0], piece));
            rest = tail;
        }
        pieces.into_par_iter().for_each(|(first, piece)| {
            join_rows(
                &runs[first..first + piece.len()],
                piece,
                first as u32,
                reach,
            );
        });
    }
    // Where bands meet: the first row of a band against the last of the one before.
    for w in starts.windows(3) {
        let (prev, at, end) = (w[0], w[1], w[2]);
        if runs[at].row != runs[at - 1].row + 1 {
            continue;
        }
        let above_row = runs[at - 1].row;
        let mut a0 = at;
        while a0 > prev && runs[a0 - 1].row == above_row {
            a0 -= 1;
        }
        let mut j = a0;
        for i in at..end {
            if runs[i].row != runs[at].row {
                break;
            }
            let run = runs[i];
            while j < at && runs[j].end + reach <= run.start {
                j += 1;
            }
            let mut k = j;
            while k < at && runs[k].start < run.end + reach {
                let (ra, rb) = (find(&mut parent, k as u32), find(&mut parent, i as u32));
                if ra != rb {
                    parent[ra.max(rb) as usize] = ra.min(rb);
                }
                k += 1;
            }
        }
    }
    let parent = &parent;
    (0..runs.len() as u32)
        .into_par_iter()
        .map(|mut i| {
            while parent[i as usize] != i {
                i = parent[i as usize];
            }
            i
        })
        .collect()
}

/// Joins the runs of one band (`runs`, whose first has index `first`) in
/// its part of the parent array.
fn join_rows(runs: &[Run], parent: &mut [u32], first: u32, reach: u32) {
    // Local indices inside; stored values are global.
    let local = |g: u32| g - first;
    let find_local = |parent: &mut [u32], i: usize| -> usize {
        let mut i = i;
        while local(parent[i]) as usize != i {
            let p = local(parent[i]) as usize;
            parent[i] = parent[p];
            i = p;
        }
        i
    };
    // The row above's runs are [j, above_end); `j` only moves past runs that
    // end before the current run can reach, which no later run of the row
    // reaches either.
    let (mut j, mut above_end, mut row_start) = (0usize, 0usize, 0usize);
    for i in 0..runs.len() {
        let run = runs[i];
        if i == 0 || run.row != runs[i - 1].row {
            if i > 0 && runs[i - 1].row + 1 == run.row {
                j = row_start;
                above_end = i;
            } else {
                j = i;
                above_end = i;
            }
            row_start = i;
        }
        while j < above_end && runs[j].end + reach <= run.start {
            j += 1;
        }
        let mut k = j;
        let mut mine = i;
        while k < above_end && runs[k].start < run.end + reach {
            let ra = find_local(parent, k);
            if mine == i && local(parent[i]) as usize == i {
                // The first run above it that touches: take its root.
                parent[i] = ra as u32 + first;
                mine = ra;
            } else {
                let rb = find_local(parent, mine);
                if ra != rb {
                    // The earlier run stays root, so roots are first in raster order.
                    parent[ra.max(rb)] = ra.min(rb) as u32 + first;
                }
                mine = ra.min(rb);
            }
            k += 1;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn mask_words_pack_in_order() {
        let mut rng = 77u64;
        for len in [1usize, 7, 8, 9, 63, 64] {
            let v: Vec<u8> = (0..len)
                .map(|_| {
                    rng = rng
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    (rng >> 60) as u8
                })
                .collect();
            let want = v
                .iter()
                .enumerate()
                .fold(0u64, |m, (i, x)| m | (u64::from(*x > 7) << i));
            assert_eq!(mask_word(&v, &|x: u8| x > 7), want, "{len}");
        }
    }
}
