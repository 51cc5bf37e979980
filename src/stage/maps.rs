//! What is known of each map as a recipe is walked (see [`crate::stage::Recipe::maps`]).

/// What is known of one map while a recipe is walked: its name, the angle its
/// kernel declares, whether it is ≥ 0 by construction, and the range of a
/// cyclic quantity (an orientation) it holds.
#[derive(Debug, Clone, PartialEq)]
pub struct MapInfo {
    /// The map's name.
    pub name: String,
    /// Declared angle in degrees (kernels, and maps made from kernels of one angle).
    pub angle: Option<f64>,
    /// ≥ 0 by construction.
    pub non_negative: bool,
    /// The period of a cyclic value, (lo, hi): lo and hi are the same direction.
    pub cyclic: Option<(f64, f64)>,
}

impl MapInfo {
    /// A plain map.
    pub fn plain(name: String, non_negative: bool) -> MapInfo {
        MapInfo {
            name,
            angle: None,
            non_negative,
            cyclic: None,
        }
    }
}
