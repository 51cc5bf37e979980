//! The border study computes each pad mode only where modes can differ: on a
//! ring of output pixels along the edges, `d` wide (the predicted band plus a
//! margin), never on the whole map.
//!
//! **Edge outputs from a cut image.** Output y reads input rows
//! [y·J − P, y·J − P + R − 1] (Dumoulin & Visin 2016, receptive-field
//! arithmetic; J jump, P padding before, R size), and padding itself reads the
//! image near its edges: a few rows in (reflect, symmetric, replicate) or the
//! far edge (wrap). So the image with its middle rows cut out, its first `a`
//! and last `b` rows kept, gives the full image's top and bottom outputs
//! exactly, as long as `a` and `b` reach further than anything those outputs
//! read (R + P for the field, 2P more for what padding reads inside, plus a
//! margin), and every stage pads the cut image as it pads the whole one: which
//! holds when the cut removes a multiple of J rows (each stage's input then
//! shrinks by a multiple of its stride, so `same` keeps its padding, and
//! `valid`, `full`, explicit padding and pools do not depend on the size).
//! Outputs near the seam are wrong and never used; the bottom outputs are
//! shifted by the cut rows over J. Columns likewise, with the rows whole.

use ndarray::{s, Array3, ArrayView3};

use crate::engine::Engine;
use crate::error::Error;
use crate::geometry::ReceptiveField;
use crate::pipeline::Plan;
use crate::stage::Recipe;

/// A map's samples on the ring `d` wide along its four edges, or on the whole
/// map when the ring would cover it.
#[derive(Debug, Clone, PartialEq)]
pub struct Ring {
    shape: (usize, usize, usize),
    d: usize,
    /// Rows [0, d) (or every row, when whole).
    top: Array3<f32>,
    /// Rows [h − d, h).
    bottom: Array3<f32>,
    /// Rows [d, h − d), columns [0, d).
    left: Array3<f32>,
    /// Rows [d, h − d), columns [w − d, w).
    right: Array3<f32>,
}

impl Ring {
    /// Whether a ring `d` wide covers a `h × w` map whole.
    fn covers(d: usize, h: usize, w: usize) -> bool {
        2 * d >= h || 2 * d >= w
    }

    /// The map's (channels, height, width).
    pub fn shape(&self) -> (usize, usize, usize) {
        self.shape
    }

    /// The ring's width (the map's larger side when it is whole).
    pub fn width(&self) -> usize {
        self.d
    }

    /// Whether (y, x) is on the ring.
    pub fn holds(&self, y: usize, x: usize) -> bool {
        let (_, h, w) = self.shape;
        y < h && x < w && (y < self.d || y + self.d >= h || x < self.d || x + self.d >= w)
    }

    /// Sample (channel, y, x).
    ///
    /// # Panics
    /// When (y, x) is not on the ring.
    pub fn get(&self, k: usize, y: usize, x: usize) -> f32 {
        let (_, h, w) = self.shape;
        let d = self.d;
        if Ring::covers(d, h, w) || y < d {
            self.top[[k, y, x]]
        } else if y + d >= h {
            self.bottom[[k, y + d - h, x]]
        } else if x < d {
            self.left[[k, y - d, x]]
        } else if x + d >= w {
            self.right[[k, y - d, x + d - w]]
        } else {
            panic!("({y}, {x}) is inside the ring of a {h}×{w} map, {d} wide")
        }
    }

    /// The positions on the ring, row by row.
    pub fn positions(&self) -> impl Iterator<Item = (usize, usize)> + '_ {
        let (_, h, w) = self.shape;
        (0..h).flat_map(move |y| {
            (0..w)
                .filter(move |&x| self.holds(y, x))
                .map(move |x| (y, x))
        })
    }

    /// Every sample on the ring.
    pub fn values(&self) -> impl Iterator<Item = f32> + '_ {
        [&self.top, &self.bottom, &self.left, &self.right]
            .into_iter()
            .flat_map(|a| a.iter().copied())
    }

    /// A ring of the same layout with each sample from `f(k, y, x)`.
    pub fn map(&self, f: impl Fn(usize, usize, usize) -> f32) -> Ring {
        let (c, h, w) = self.shape;
        let d = self.d;
        let fill = |a: &Array3<f32>, y0: usize, x0: usize| {
            Array3::from_shape_fn(a.dim(), |(k, y, x)| f(k, y0 + y, x0 + x))
        };
        let _ = c;
        Ring {
            shape: self.shape,
            d,
            top: fill(&self.top, 0, 0),
            bottom: fill(&self.bottom, h.saturating_sub(d), 0),
            left: fill(&self.left, d, 0),
            right: fill(&self.right, d, w.saturating_sub(d)),
        }
    }
}

/// How far outputs reach along one axis, over all channels: the jump, and
/// the largest field size and padding before.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Reach {
    jump: usize,
    size: usize,
    before: usize,
}

impl Reach {
    /// The reach of a plan's channels along rows (`rows`) or columns.
    pub(crate) fn of(plan: &Plan, rows: bool) -> Reach {
        let f = |p: &(ReceptiveField, ReceptiveField)| if rows { p.0 } else { p.1 };
        let fields = plan.fields();
        Reach {
            jump: fields.first().map_or(1, |p| f(p).jump),
            size: fields.iter().map(|p| f(p).size).max().unwrap_or(1),
            before: fields.iter().map(|p| f(p).offset).max().unwrap_or(0),
        }
    }

    /// Input samples read, from the nearer edge, by the outputs within `k` of
    /// an edge (module header), with a margin.
    fn span(&self, k: usize) -> usize {
        k * self.jump + self.size + 3 * self.before + 2 * self.jump
    }
}

/// Rows (or columns) removed from the middle of `n` to give the first and
/// last `k` outputs: a multiple of J, leaving at least the span they read at
/// each end.
fn removed_from_middle(n: usize, reach: Reach, k: usize) -> usize {
    let j = reach.jump.max(1);
    n.saturating_sub(2 * reach.span(k)) / j * j
}

/// Bytes [`ring_outputs`] holds at its busiest for an input of `dim` and an
/// output map of `shape` (the whole map's case): the cut image, its plan's
/// busiest stage and the ring kept, for the larger of the two axes' cuts.
pub(crate) fn ring_bytes(
    recipe: &Recipe,
    dim: (usize, usize, usize),
    reach: (Reach, Reach),
    (c, h, w): (usize, usize, usize),
    d: usize,
    engine: Engine,
) -> Result<u64, Error> {
    let (ic, ih, iw) = dim;
    let f32s = |n: usize| (n as u64).saturating_mul(4);
    if Ring::covers(d, h, w) {
        let plan = Plan::new(recipe, dim, engine)?;
        return Ok(plan.peak_bytes().saturating_add(f32s(c * h * w)));
    }
    let cut_rows = ih - removed_from_middle(ih, reach.0, d);
    let cut_cols = iw - removed_from_middle(iw, reach.1, d);
    let mut most = 0u64;
    for cut in [(ic, cut_rows, iw), (ic, ih, cut_cols)] {
        let plan = Plan::new(recipe, cut, engine)?;
        most = most.max(
            f32s(cut.0 * cut.1 * cut.2)
                .saturating_add(plan.peak_bytes())
                .saturating_add({
                    let (a, b, c) = plan.output_shape();
                    f32s(a * b * c)
                }),
        );
    }
    let ring = f32s(c * (2 * d * w + 2 * d * h));
    Ok(most.saturating_add(ring))
}

/// The first `k0` and the last `k1` outputs along `axis` (1 rows, 2 columns)
/// of `recipe` over `input`, every output along the other axis: from the input
/// cut along `axis` (module header), or whole when the cut would keep it all.
fn edge_outputs(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    reach: Reach,
    axis: usize,
    (k0, k1): (usize, usize),
    engine: Engine,
) -> Result<(Array3<f32>, Array3<f32>), Error> {
    let n = if axis == 1 {
        input.dim().1
    } else {
        input.dim().2
    };
    let removed = removed_from_middle(n, reach, k0.max(k1));
    let keep = reach.span(k0.max(k1));
    let cut = if removed == 0 {
        input.to_owned()
    } else {
        let a = keep;
        let b = n - removed - a;
        let ax = ndarray::Axis(axis);
        ndarray::concatenate(
            ax,
            &[
                input.slice_axis(ax, ndarray::Slice::from(0..a)),
                input.slice_axis(ax, ndarray::Slice::from(n - b..n)),
            ],
        )
        .expect("one layout")
    };
    let out = Plan::new(recipe, cut.dim(), engine)?.run(cut.view())?;
    let m = if axis == 1 { out.dim().1 } else { out.dim().2 };
    if k0 > m || k1 > m {
        return Err(Error::shape(format!(
            "the border study's cut image gives {m} outputs, fewer than the {} it needs",
            k0.max(k1)
        )));
    }
    let ax = ndarray::Axis(axis);
    Ok((
        out.slice_axis(ax, ndarray::Slice::from(0..k0)).to_owned(),
        out.slice_axis(ax, ndarray::Slice::from(m - k1..m))
            .to_owned(),
    ))
}

/// `recipe`'s outputs over `input` on the ring `d` wide of an output map of
/// `shape` that starts at output (dy, dx) of a full map of `full` (rows, cols)
/// outputs: (0, 0) and the input's own map, or the crop study's window inside
/// the full image's.
#[allow(clippy::too_many_arguments)]
pub(crate) fn ring_outputs(
    recipe: &Recipe,
    input: ArrayView3<f32>,
    reach: (Reach, Reach),
    (c, h, w): (usize, usize, usize),
    (dy, dx): (usize, usize),
    (fh, fw): (usize, usize),
    d: usize,
    engine: Engine,
) -> Result<Ring, Error> {
    if Ring::covers(d, h, w) {
        let whole = Plan::new(recipe, input.dim(), engine)?.run(input)?;
        return Ok(Ring {
            shape: (c, h, w),
            d: h.max(w),
            top: whole.slice(s![.., dy..dy + h, dx..dx + w]).to_owned(),
            bottom: Array3::zeros((c, 0, w)),
            left: Array3::zeros((c, 0, 0)),
            right: Array3::zeros((c, 0, 0)),
        });
    }
    // Full-map rows [dy, dy + d) and [dy + h − d, dy + h): the first dy + d and
    // the last fh − (dy + h − d) rows of the full map; columns alike.
    let (top, bottom) = edge_outputs(
        recipe,
        input,
        reach.0,
        1,
        (dy + d, fh - (dy + h - d)),
        engine,
    )?;
    let (left, right) = edge_outputs(
        recipe,
        input,
        reach.1,
        2,
        (dx + d, fw - (dx + w - d)),
        engine,
    )?;
    let rows = |a: &Array3<f32>, r0: usize| a.slice(s![.., r0..r0 + d, dx..dx + w]).to_owned();
    let cols =
        |a: &Array3<f32>, c0: usize| a.slice(s![.., dy + d..dy + h - d, c0..c0 + d]).to_owned();
    Ok(Ring {
        shape: (c, h, w),
        d,
        top: rows(&top, dy),
        bottom: rows(&bottom, 0),
        left: cols(&left, dx),
        right: cols(&right, 0),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{ConvOptions, ConvStage};
    use crate::geometry::Extent;
    use crate::kernel::builtin::resolve_bank;
    use crate::stage::{Pool, PoolKind, PoolWindow, Stage};

    #[test]
    fn rings_from_cut_images_equal_the_whole_run_for_every_mode() {
        use crate::border::PadMode;
        let input = Array3::from_shape_fn((1, 97, 83), |(_, y, x)| {
            ((y * 31 + x * 17) % 23) as f32 / 23.0 + 0.01 * (x as f32).sin()
        });
        let conv = |bank: &str, extent, stride, pad| {
            Stage::Conv(ConvStage {
                bank: resolve_bank(bank).unwrap(),
                options: ConvOptions {
                    pad,
                    extent,
                    stride: (stride, stride),
                    ..ConvOptions::default()
                },
            })
        };
        let pool = Stage::Pool(Pool {
            kind: PoolKind::Max,
            window: PoolWindow::Sized {
                size: (2, 2),
                stride: (2, 2),
            },
        });
        for pad in PadMode::ALL {
            for stages in [
                vec![conv("gaussian:sigma=1.5", Extent::Same, 1, pad)],
                vec![conv("smooth", Extent::Same, 1, pad)],
                vec![conv("sobel-x+sobel-y", Extent::Same, 2, pad), pool.clone()],
                vec![
                    conv("box:size=3", Extent::Valid, 1, pad),
                    conv("log:sigma=1", Extent::Full, 1, pad),
                ],
                vec![
                    conv("sobel-y", Extent::Same, 3, pad),
                    conv("box:size=5", Extent::Same, 1, pad),
                ],
            ] {
                let recipe = Recipe { stages };
                let plan = Plan::new(&recipe, input.dim(), Engine::Direct).unwrap();
                let whole = plan.run(input.view()).unwrap();
                let reach = (Reach::of(&plan, true), Reach::of(&plan, false));
                let (c, oh, ow) = whole.dim();
                // The map's own ring, and a window's ring inside it (the crop study's truth).
                for (d, (dy, dx), (h, w)) in [
                    (1, (0, 0), (oh, ow)),
                    (3, (0, 0), (oh, ow)),
                    (2, (3, 2), (oh - 7, ow - 5)),
                ] {
                    let ring = ring_outputs(
                        &recipe,
                        input.view(),
                        reach,
                        (c, h, w),
                        (dy, dx),
                        (oh, ow),
                        d,
                        Engine::Direct,
                    )
                    .unwrap();
                    for (y, x) in ring.positions() {
                        for k in 0..c {
                            assert_eq!(
                                ring.get(k, y, x).to_bits(),
                                whole[[k, dy + y, dx + x]].to_bits(),
                                "{pad} {} stages, d {d}, at ({k}, {y}, {x})",
                                recipe.stages.len()
                            );
                        }
                    }
                }
            }
        }
    }
}
