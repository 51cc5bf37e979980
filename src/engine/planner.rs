//! The planner: which strategy computes a prepared stage, and why. Thresholds
//! are measured, not guessed; each constant says how (`cargo bench --bench
//! engine -- …_threshold`). A forced engine is taken as asked where the bank
//! suits it.

use crate::engine::prepared::PreparedStage;
use crate::engine::{Choice, Engine};

/// Smallest kernel side from which the separable passes beat the direct strategy
/// (measured with `cargo bench --bench engine -- separable_threshold`, medians on
/// 1024²: 3×3 ran 1.54 ms direct against 1.96 ms separable, 5×5 2.49 against
/// 2.23, 7×7 3.56 against 2.29, 13×13 9.70 against 3.08).
pub const SEPARABLE_FROM: usize = 5;

/// Smallest product (kernels × input channels × taps per plane) from which the
/// matrix product beats the direct strategy. Measured with `cargo bench --bench
/// engine -- matmul_threshold` (medians, 2 cores): 8×1×3×3 (72) tied at 28 ms on
/// 1024², 16×1×3×3 (144) ran 54 ms direct against 41 ms matmul, 64×3×7×7 on 512²
/// 271 ms against 79 ms.
pub const MATMUL_FROM: usize = 128;

/// Fewest taps per output sample (kernel taps ÷ stride area) from which the FFT
/// strategy beats the others for kernels that are not rank 1. Measured with
/// `cargo bench --bench engine -- fft_threshold` (medians on 1024², 2 cores, one
/// of them busy): one kernel 11×11 ran 12.2 ms direct against 13.4 ms FFT, 13×13
/// 15.8 against 12.2, 21×21 34.6 against 14.3; a bank of 8 ran 11×11 61 ms
/// matmul against 70 ms FFT, 15×15 130 against 59.
pub const FFT_FROM: usize = 169;

/// Fewest kernels for the matrix product: with fewer, the product is close to a
/// matrix-vector one and the column copy is not repaid.
pub const MATMUL_MIN_KERNELS: usize = 8;

/// True when every kernel has the same size and padding (what `matmul` needs).
fn uniform(stage: &PreparedStage) -> bool {
    let k0 = &stage.kernels[0];
    stage
        .kernels
        .iter()
        .all(|k| (k.rows, k.cols, k.geometry) == (k0.rows, k0.cols, k0.geometry))
}

/// Picks the strategy for a stage; a forced engine is taken as asked (forcing a
/// strategy the bank does not suit falls back to `direct`, and says so).
pub(crate) fn choose(stage: &PreparedStage, requested: Engine) -> Choice {
    let all_separable = stage.kernels.iter().all(|k| k.factors.is_some());
    let smallest = stage
        .kernels
        .iter()
        .map(|k| k.rows.min(k.cols))
        .min()
        .unwrap_or(0);
    let work =
        stage.kernels.len() * stage.channels * stage.kernels.first().map_or(0, |k| k.rows * k.cols);
    let fallback = |why: &str| Choice {
        engine: Engine::Direct,
        reason: why.to_string(),
    };
    let separable_pays = all_separable && smallest >= SEPARABLE_FROM;
    let taps_per_output = stage
        .kernels
        .iter()
        .map(|k| k.rows * k.cols / (k.geometry.rows.stride * k.geometry.cols.stride).max(1))
        .min()
        .unwrap_or(0);
    match requested {
        Engine::Auto if !separable_pays && taps_per_output >= FFT_FROM => Choice {
            engine: Engine::Fft,
            reason: format!(
                "{taps_per_output} taps per output ≥ {FFT_FROM} and not rank 1: \
                 a product of transforms costs the same for any kernel size"
            ),
        },
        Engine::Auto
            if uniform(stage)
                && work >= MATMUL_FROM
                && stage.kernels.len() >= MATMUL_MIN_KERNELS
                && !(all_separable && smallest >= SEPARABLE_FROM) =>
        {
            Choice {
                engine: Engine::Matmul,
                reason: format!(
                    "{} kernels × {} channels × {} taps ≥ {MATMUL_FROM}: a matrix product pays",
                    stage.kernels.len(),
                    stage.channels,
                    work / stage.kernels.len().max(1) / stage.channels.max(1)
                ),
            }
        }
        Engine::Auto if all_separable && smallest >= SEPARABLE_FROM => Choice {
            engine: Engine::Separable,
            reason: format!("every kernel is rank 1 and at least {SEPARABLE_FROM} taps a side"),
        },
        Engine::Auto if all_separable => fallback(&format!(
            "rank-1 kernels under {SEPARABLE_FROM} taps a side run faster directly"
        )),
        Engine::Auto => fallback("small bank, kernels not all rank 1: direct row multiply-adds"),
        Engine::Separable if !all_separable => {
            fallback("separable forced, but some kernel is not rank 1")
        }
        Engine::Matmul if !uniform(stage) => {
            fallback("matmul forced, but the kernels differ in size or padding")
        }
        forced => Choice {
            engine: forced,
            reason: "forced by --engine".into(),
        },
    }
}
