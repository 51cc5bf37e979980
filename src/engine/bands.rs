//! Bands of output rows: what the direct, separable, fused and FFT strategies
//! share. A band of output rows [o0, o1) of a stage at row stride s reads the
//! padded input rows [o0·s, (o1 − 1)·s + k_eff) (Dumoulin & Visin 2016,
//! relationship 15 read backwards), so each band pads just those rows into a
//! small buffer and is computed on its own, in parallel with the others.
//!
//! Output is `kernels × out_height × out_width`, kernel-major, so one band's
//! rows are one slice in every kernel's plane: [`row_bands`] splits the output
//! into those slices with safe, disjoint borrows, and each parallel task owns
//! its band's slices outright.

use rayon::prelude::*;

use crate::engine::buffers::Buffers;
use crate::engine::prepared::{Geometry, PreparedKernel, PreparedStage};

/// Pads every input channel for one kernel's geometry into `out`
/// (`channels × padded height × padded width`), reusing its allocation.
pub(crate) fn pad_input(
    st: &PreparedStage,
    g: &Geometry,
    input: &[f32],
    out: &mut Vec<f32>,
    bufs: &Buffers,
) {
    let (h, w) = (st.height, st.width);
    let plane = g.rows.padded() * g.cols.padded();
    let total = st.channels * plane;
    if out.capacity() < total {
        *out = bufs.take(total);
    }
    // Every sample is overwritten below; reused memory keeps its old values
    // meanwhile, and only growth is zero-filled to make the memory valid.
    out.truncate(total);
    out.resize(total, 0.0);
    for (c, dst) in out.chunks_exact_mut(plane).enumerate() {
        crate::border::pad_plane_into(
            &input[c * h * w..(c + 1) * h * w],
            (h, w),
            st.pad,
            (g.rows.pad_before, g.rows.pad_after),
            (g.cols.pad_before, g.cols.pad_after),
            dst,
        );
    }
}

/// The stage's kernels grouped by padding (in order): kernels of one group read
/// the same padded rows, so a band of rows is padded once for all of them.
pub(crate) fn pad_groups(st: &PreparedStage) -> Vec<Vec<usize>> {
    let pads = |k: &PreparedKernel| {
        let (r, c) = (k.geometry.rows, k.geometry.cols);
        (r.pad_before, r.pad_after, c.pad_before, c.pad_after)
    };
    let mut groups: Vec<Vec<usize>> = Vec::new();
    for (n, k) in st.kernels.iter().enumerate() {
        match groups
            .iter_mut()
            .find(|g| pads(&st.kernels[g[0]]) == pads(k))
        {
            Some(g) => g.push(n),
            None => groups.push(vec![n]),
        }
    }
    groups
}

/// One band of output rows [o0, o1) of a pad group: the padded input rows it
/// reads, [p0, p0 + rows).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Band {
    /// First output row.
    pub o0: usize,
    /// One past the last output row.
    pub o1: usize,
    /// First padded input row read.
    pub p0: usize,
    /// Padded input rows read.
    pub rows: usize,
}

/// Bands of `per_band` output rows for the kernels of `group`, with the padded
/// rows each reads (the tallest dilated kernel of the group decides).
pub(crate) fn bands(st: &PreparedStage, group: &[usize], per_band: usize) -> Vec<Band> {
    let g = st.kernels[group[0]].geometry;
    let ekh = group
        .iter()
        .map(|&n| st.kernels[n].geometry.rows.effective_kernel())
        .max()
        .unwrap_or(1);
    let sy = g.rows.stride;
    (0..st.out_height)
        .step_by(per_band.max(1))
        .map(|o0| {
            let o1 = (o0 + per_band.max(1)).min(st.out_height);
            let p0 = o0 * sy;
            Band {
                o0,
                o1,
                p0,
                rows: (o1 - 1) * sy + ekh - p0,
            }
        })
        .collect()
}

/// Pads just the rows of `band` of every input channel, for the padding of
/// kernel `n`, into `rows` (`channels × band.rows × padded width`).
pub(crate) fn pad_band(
    st: &PreparedStage,
    n: usize,
    input: &[f32],
    band: Band,
    rows: &mut Vec<f32>,
) {
    let g = st.kernels[n].geometry;
    let pw = g.cols.padded();
    let plane = st.height * st.width;
    rows.clear();
    rows.resize(st.channels * band.rows * pw, 0.0);
    for (c, dst) in rows.chunks_exact_mut(band.rows * pw).enumerate() {
        crate::border::pad_rows_into(
            &input[c * plane..(c + 1) * plane],
            (st.height, st.width),
            st.pad,
            g.rows.pad_before,
            (g.cols.pad_before, g.cols.pad_after),
            band.p0..band.p0 + band.rows,
            dst,
        );
    }
}

/// Splits `out`, planes of `plane_len` samples laid one after another, into
/// per-band pieces: for each row range of `ranges` (increasing, disjoint, in
/// rows of `width` samples), the slice of those rows in each plane of `planes`
/// (in the order given). `result[band][i]` is band `band`'s rows of plane
/// `planes[i]`. Every borrow is disjoint, so the bands can be filled in parallel.
///
/// # Panics
/// When a range or plane lies outside `out`, or ranges overlap or go backwards.
pub(crate) fn row_bands<'a>(
    out: &'a mut [f32],
    plane_len: usize,
    width: usize,
    planes: &[usize],
    ranges: &[(usize, usize)],
) -> Vec<Vec<&'a mut [f32]>> {
    let mut all: Vec<Option<&'a mut [f32]>> = out.chunks_exact_mut(plane_len).map(Some).collect();
    let mut result: Vec<Vec<&'a mut [f32]>> = ranges
        .iter()
        .map(|_| Vec::with_capacity(planes.len()))
        .collect();
    for &p in planes {
        let mut rest: &'a mut [f32] = all
            .get_mut(p)
            .and_then(Option::take)
            .unwrap_or_else(|| panic!("plane {p} is not in the output, or was asked for twice"));
        let mut at = 0usize;
        for (band, &(r0, r1)) in ranges.iter().enumerate() {
            assert!(r0 >= at && r1 >= r0, "row ranges must increase");
            let skip = (r0 - at) * width;
            let take = (r1 - r0) * width;
            let (_, tail) = std::mem::take(&mut rest).split_at_mut(skip);
            let (mine, tail) = tail.split_at_mut(take);
            result[band].push(mine);
            rest = tail;
            at = r1;
        }
    }
    result
}

/// Calls `body(state, group, band, rows, padded_width, dst)` for every band of
/// output rows of every pad group (bands of `per_band(group)` rows, in
/// parallel), with `rows` holding just the padded input rows the band reads
/// (`channels × band.rows × padded width`) and `dst[i]` the band's output rows
/// of kernel `group[i]`; `init` makes each task's own `state`.
pub(crate) fn for_each_band<S>(
    st: &PreparedStage,
    input: &[f32],
    out: &mut [f32],
    per_band: impl Fn(&[usize]) -> usize,
    init: impl Fn() -> S + Sync + Send,
    body: impl Fn(&mut S, &[usize], Band, &[f32], usize, &mut [&mut [f32]]) + Sync + Send,
) {
    let plane = st.out_height * st.out_width;
    for group in pad_groups(st) {
        let pw = st.kernels[group[0]].geometry.cols.padded();
        let group = &group;
        let bands = bands(st, group, per_band(group));
        let ranges: Vec<(usize, usize)> = bands.iter().map(|b| (b.o0, b.o1)).collect();
        let dsts = row_bands(out, plane, st.out_width, group, &ranges);
        bands.into_par_iter().zip(dsts).for_each_init(
            || (Vec::new(), init()),
            |(rows, state), (band, mut dst)| {
                pad_band(st, group[0], input, band, rows);
                body(state, group, band, rows, pw, &mut dst);
            },
        );
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn row_bands_are_the_rows_of_each_plane() {
        // Two planes of 4 rows × 3 columns holding their own flat index.
        let mut out: Vec<f32> = (0..24).map(|v| v as f32).collect();
        let b = row_bands(&mut out, 12, 3, &[1, 0], &[(0, 1), (1, 1), (2, 4)]);
        assert_eq!(b.len(), 3);
        assert_eq!(b[0][0], &[12.0, 13.0, 14.0]);
        assert_eq!(b[0][1], &[0.0, 1.0, 2.0]);
        assert!(b[1][0].is_empty());
        assert_eq!(b[2][1], &[6.0, 7.0, 8.0, 9.0, 10.0, 11.0]);
    }

    #[test]
    #[should_panic(expected = "row ranges must increase")]
    fn overlapping_ranges_are_refused() {
        let mut out = vec![0.0f32; 12];
        row_bands(&mut out, 12, 3, &[0], &[(0, 2), (1, 3)]);
    }
}
