//! Built-in kernel families, each with its parameters and its published definition.
//!
//! A family is named with optional parameters, `gaussian:sigma=1.5,radius=4` on the
//! command line or `family = "gaussian"` with `params = { sigma = 1.5 }` in a bank
//! file. Derivative masks are printed the way textbooks print them and are meant
//! for `correlate`: with x growing to the right and y growing downwards, a
//! brightness that increases to the right gives a positive `sobel-x` response.

use std::collections::BTreeMap;
use std::fmt;

use crate::error::Error;
use crate::kernel::Kernel;

/// A family name with parameter values (those not given take their defaults).
#[derive(Debug, Clone, PartialEq)]
pub struct FamilySpec {
    /// Family name, e.g. `gaussian`.
    pub family: String,
    /// Parameters given explicitly.
    pub params: BTreeMap<String, f64>,
}

impl fmt::Display for FamilySpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.family)?;
        for (i, (k, v)) in self.params.iter().enumerate() {
            write!(f, "{}{k}={v}", if i == 0 { ':' } else { ',' })?;
        }
        Ok(())
    }
}

impl FamilySpec {
    /// Parses `family` or `family:key=value,key=value`.
    pub fn parse(s: &str) -> Result<FamilySpec, Error> {
        let (family, rest) = s.split_once(':').unwrap_or((s, ""));
        let mut params = BTreeMap::new();
        for item in rest.split(',').filter(|p| !p.trim().is_empty()) {
            let (k, v) = item.split_once('=').ok_or_else(|| {
                Error::bank(format!("parameter '{item}' in '{s}' is not key=value"))
            })?;
            let v: f64 = v.trim().parse().map_err(|_| {
                Error::bank(format!("parameter {k} in '{s}' is not a number: '{v}'"))
            })?;
            if params.insert(k.trim().to_string(), v).is_some() {
                return Err(Error::bank(format!(
                    "parameter {} is given twice in '{s}'; give it once",
                    k.trim()
                )));
            }
        }
        Ok(FamilySpec {
            family: family.trim().to_string(),
            params,
        })
    }

    /// Builds the kernel, named after the spec unless `name` is given.
    pub fn build(&self, name: Option<&str>) -> Result<Kernel, Error> {
        let info = find(&self.family).ok_or_else(|| {
            Error::bank(format!(
                "unknown kernel family '{}'{}",
                self.family,
                near_names_hint(&self.family, FAMILIES.iter().map(|f| f.name))
            ))
        })?;
        for k in self.params.keys() {
            if !info.params.iter().any(|p| p.name == k) {
                let known: Vec<&str> = info.params.iter().map(|p| p.name).collect();
                return Err(Error::bank(format!(
                    "family '{}' has no parameter '{k}' (its parameters: {})",
                    info.name,
                    if known.is_empty() {
                        "none".to_string()
                    } else {
                        known.join(", ")
                    }
                )));
            }
        }
        let p = Params { spec: self, info };
        let rows = (info.build)(&p)?;
        let mut k = Kernel::from_rows(name.unwrap_or(&self.to_string()), &rows)?;
        k.origin = Some(self.clone());
        Ok(k)
    }
}

/// One parameter of a family.
#[derive(Debug, Clone, Copy)]
pub struct ParamInfo {
    /// Name as written in specs and files.
    pub name: &'static str,
    /// Value used when not given; `None` means derived (see `meaning`).
    pub default: Option<f64>,
    /// What it means and its unit.
    pub meaning: &'static str,
}

/// A built-in family: name, parameters, one-line summary, published source.
pub struct FamilyInfo {
    /// Family name.
    pub name: &'static str,
    /// Its parameters.
    pub params: &'static [ParamInfo],
    /// One line for `bank list`.
    pub summary: &'static str,
    /// Where the definition is published.
    pub source: &'static str,
    build: fn(&Params) -> Result<Vec<Vec<f64>>, Error>,
}

struct Params<'a> {
    spec: &'a FamilySpec,
    info: &'a FamilyInfo,
}

impl Params<'_> {
    fn get(&self, name: &str) -> Option<f64> {
        self.spec.params.get(name).copied().or_else(|| {
            self.info
                .params
                .iter()
                .find(|p| p.name == name)
                .and_then(|p| p.default)
        })
    }
    fn positive(&self, name: &str) -> Result<f64, Error> {
        let v = self.get(name).unwrap_or(f64::NAN);
        if v.is_finite() && v > 0.0 {
            Ok(v)
        } else {
            Err(Error::bank(format!(
                "{}: {name} must be a positive number, got {v}",
                self.info.name
            )))
        }
    }
    fn finite(&self, name: &str) -> Result<f64, Error> {
        let v = self.get(name).unwrap_or(0.0);
        if v.is_finite() {
            Ok(v)
        } else {
            Err(Error::bank(format!(
                "{}: {name} must be finite, got {v}",
                self.info.name
            )))
        }
    }
    fn size(&self, name: &str, odd: bool) -> Result<usize, Error> {
        let v = self.get(name).unwrap_or(f64::NAN);
        let ok = v.is_finite() && v >= 1.0 && v.fract() == 0.0 && v <= 1025.0;
        if !ok || (odd && (v as usize) % 2 == 0) {
            let what = if odd {
                "an odd whole number"
            } else {
                "a whole number"
            };
            return Err(Error::bank(format!(
                "{}: {name} must be {what} from 1 to 1025, got {v}",
                self.info.name
            )));
        }
        Ok(v as usize)
    }
    /// `radius` if given, else ceil(factor · sigma); at most 512.
    fn radius(&self, sigma: f64, factor: f64) -> Result<usize, Error> {
        let (r, given) = match self.spec.params.get("radius") {
            Some(r) => (*r, true),
            None => ((factor * sigma).ceil(), false),
        };
        if r.is_finite() && r >= 0.0 && r.fract() == 0.0 && r <= 512.0 {
            Ok(r as usize)
        } else if given {
            Err(Error::bank(format!(
                "{}: radius must be a whole number from 0 to 512, got {r}",
                self.info.name
            )))
        } else {
            Err(Error::bank(format!(
                "{}: sigma {sigma} needs radius {r}, over the limit of 512",
                self.info.name
            )))
        }
    }
}

fn fixed(rows: &[&[f64]]) -> Vec<Vec<f64>> {
    rows.iter().map(|r| r.to_vec()).collect()
}

/// Outer product column ⊗ row.
pub fn outer(col: &[f64], row: &[f64]) -> Vec<Vec<f64>> {
    col.iter()
        .map(|c| row.iter().map(|r| c * r).collect())
        .collect()
}

/// Sampled 1-D Gaussian exp(−x²/2σ²) at integer x in −r..=r, normalised to sum 1.
pub fn gaussian_1d(sigma: f64, radius: usize) -> Vec<f64> {
    let r = radius as isize;
    let v: Vec<f64> = (-r..=r)
        .map(|x| (-((x * x) as f64) / (2.0 * sigma * sigma)).exp())
        .collect();
    let s: f64 = v.iter().sum();
    v.into_iter().map(|x| x / s).collect()
}

/// Row `n − 1` of Pascal's triangle divided by 2^(n−1).
pub fn binomial_1d(n: usize) -> Vec<f64> {
    let mut row = vec![1.0f64];
    for _ in 1..n {
        let mut next = vec![1.0; row.len() + 1];
        for i in 1..row.len() {
            next[i] = row[i - 1] + row[i];
        }
        row = next;
    }
    let s: f64 = row.iter().sum();
    row.into_iter().map(|x| x / s).collect()
}

const SIGMA: ParamInfo = ParamInfo {
    name: "sigma",
    default: Some(1.0),
    meaning: "standard deviation in pixels",
};
const RADIUS: ParamInfo = ParamInfo {
    name: "radius",
    default: None,
    meaning: "half-width in taps (size 2·radius+1); default ceil(3·sigma)",
};

/// Every built-in family.
pub static FAMILIES: &[FamilyInfo] = &[
    FamilyInfo {
        name: "identity",
        params: &[ParamInfo { name: "size", default: Some(1.0), meaning: "odd side length" }],
        summary: "1 at the centre, 0 elsewhere: passes the image through",
        source: "common practice, no source",
        build: |p| {
            let n = p.size("size", true)?;
            let mut rows = vec![vec![0.0; n]; n];
            rows[n / 2][n / 2] = 1.0;
            Ok(rows)
        },
    },
    FamilyInfo {
        name: "box",
        params: &[ParamInfo { name: "size", default: Some(3.0), meaning: "side length" }],
        summary: "mean of a size×size window (all taps 1/size²)",
        source: "Gonzalez & Woods, Digital Image Processing, 3rd ed., §3.5.1 (smoothing spatial filters)",
        build: |p| {
            let n = p.size("size", false)?;
            Ok(vec![vec![1.0 / (n * n) as f64; n]; n])
        },
    },
    FamilyInfo {
        name: "binomial",
        params: &[ParamInfo { name: "size", default: Some(5.0), meaning: "side length (taps per axis)" }],
        summary: "outer product of a normalised Pascal-triangle row; size 5 is [1 4 6 4 1]/16 per axis",
        source: "Szeliski, Computer Vision: Algorithms and Applications, 2010, §3.2.1, Fig. 3.14",
        build: |p| {
            let b = binomial_1d(p.size("size", false)?);
            Ok(outer(&b, &b))
        },
    },
    FamilyInfo {
        name: "sobel-x",
        params: &[],
        summary: "[1 2 1]ᵀ ⊗ [−1 0 1]: horizontal derivative, positive where brightness rises to the right",
        source: "Szeliski 2010, §3.2.1, Fig. 3.14; Gonzalez & Woods 3rd ed., §3.6.4",
        build: |_| Ok(outer(&[1.0, 2.0, 1.0], &[-1.0, 0.0, 1.0])),
    },
    FamilyInfo {
        name: "sobel-y",
        params: &[],
        summary: "[−1 0 1]ᵀ ⊗ [1 2 1]: vertical derivative, positive where brightness rises downwards",
        source: "Szeliski 2010, §3.2.1, Fig. 3.14; Gonzalez & Woods 3rd ed., §3.6.4",
        build: |_| Ok(outer(&[-1.0, 0.0, 1.0], &[1.0, 2.0, 1.0])),
    },
    FamilyInfo {
        name: "scharr-x",
        params: &[],
        summary: "[3 10 3]ᵀ ⊗ [−1 0 1]: horizontal derivative with better rotational symmetry",
        source: "Scharr, Optimale Operatoren in der digitalen Bildverarbeitung, PhD thesis, Heidelberg, 2000; Jähne, Digital Image Processing, 6th ed., §12.7",
        build: |_| Ok(outer(&[3.0, 10.0, 3.0], &[-1.0, 0.0, 1.0])),
    },
    FamilyInfo {
        name: "scharr-y",
        params: &[],
        summary: "[−1 0 1]ᵀ ⊗ [3 10 3]: vertical derivative",
        source: "Scharr 2000; Jähne, Digital Image Processing, 6th ed., §12.7",
        build: |_| Ok(outer(&[-1.0, 0.0, 1.0], &[3.0, 10.0, 3.0])),
    },
    FamilyInfo {
        name: "prewitt-x",
        params: &[],
        summary: "[1 1 1]ᵀ ⊗ [−1 0 1]: horizontal derivative",
        source: "Prewitt 1970, in Picture Processing and Psychopictorics; Gonzalez & Woods 3rd ed., §10.2.5",
        build: |_| Ok(outer(&[1.0, 1.0, 1.0], &[-1.0, 0.0, 1.0])),
    },
    FamilyInfo {
        name: "prewitt-y",
        params: &[],
        summary: "[−1 0 1]ᵀ ⊗ [1 1 1]: vertical derivative",
        source: "Prewitt 1970; Gonzalez & Woods 3rd ed., §10.2.5",
        build: |_| Ok(outer(&[-1.0, 0.0, 1.0], &[1.0, 1.0, 1.0])),
    },
    FamilyInfo {
        name: "laplace-4",
        params: &[],
        summary: "[[0 1 0] [1 −4 1] [0 1 0]]: 4-neighbour Laplacian, sums to 0",
        source: "Gonzalez & Woods, Digital Image Processing, 3rd ed., §3.6.2, Fig. 3.37(a)",
        build: |_| Ok(fixed(&[&[0.0, 1.0, 0.0], &[1.0, -4.0, 1.0], &[0.0, 1.0, 0.0]])),
    },
    FamilyInfo {
        name: "laplace-8",
        params: &[],
        summary: "[[1 1 1] [1 −8 1] [1 1 1]]: 8-neighbour Laplacian, sums to 0",
        source: "Gonzalez & Woods, Digital Image Processing, 3rd ed., §3.6.2, Fig. 3.37(b)",
        build: |_| Ok(fixed(&[&[1.0, 1.0, 1.0], &[1.0, -8.0, 1.0], &[1.0, 1.0, 1.0]])),
    },
    FamilyInfo {
        name: "gaussian",
        params: &[SIGMA, RADIUS],
        summary: "sampled exp(−(x²+y²)/2σ²), size 2·radius+1, normalised to sum 1",
        source: "Szeliski 2010, §3.2.1 (eq. 3.30); radius rule ceil(3σ): common practice, no source",
        build: |p| {
            let sigma = p.positive("sigma")?;
            let g = gaussian_1d(sigma, p.radius(sigma, 3.0)?);
            Ok(outer(&g, &g))
        },
    },
    FamilyInfo {
        name: "log",
        params: &[SIGMA, RADIUS],
        summary: "Laplacian of Gaussian ((r²−2σ²)/σ⁴)·exp(−r²/2σ²), shifted to sum 0 (negative centre)",
        source: "Marr & Hildreth, Theory of edge detection, Proc. R. Soc. Lond. B 207 (1980); Gonzalez & Woods 3rd ed., §10.2.6, eq. 10.2-23",
        build: |p| {
            let sigma = p.positive("sigma")?;
            let r = p.radius(sigma, 3.0)? as isize;
            let s2 = sigma * sigma;
            let mut rows: Vec<Vec<f64>> = (-r..=r)
                .map(|y| {
                    (-r..=r)
                        .map(|x| {
                            let rr = (x * x + y * y) as f64;
                            (rr - 2.0 * s2) / (s2 * s2) * (-rr / (2.0 * s2)).exp()
                        })
                        .collect()
                })
                .collect();
            // The sampled, truncated LoG does not sum to 0; G&W §10.2.6 asks that it does.
            let n = ((2 * r + 1) * (2 * r + 1)) as f64;
            let mean: f64 = rows.iter().flatten().sum::<f64>() / n;
            rows.iter_mut().flatten().for_each(|v| *v -= mean);
            Ok(rows)
        },
    },
    FamilyInfo {
        name: "dog",
        params: &[
            SIGMA,
            ParamInfo { name: "ratio", default: Some(1.6), meaning: "sigma of the wider Gaussian / sigma" },
            ParamInfo {
                name: "radius",
                default: None,
                meaning: "half-width in taps; default ceil(3·sigma·ratio)",
            },
        ],
        summary: "difference of Gaussians G(σ) − G(ratio·σ), each normalised to sum 1 on the same support",
        source: "Marr & Hildreth 1980 (ratio 1.6 approximates the LoG); Szeliski 2010, §3.5.2",
        build: |p| {
            let sigma = p.positive("sigma")?;
            let ratio = p.positive("ratio")?;
            let r = p.radius(sigma * ratio, 3.0)?;
            let a = gaussian_1d(sigma, r);
            let b = gaussian_1d(sigma * ratio, r);
            let (ga, gb) = (outer(&a, &a), outer(&b, &b));
            Ok(ga
                .iter()
                .zip(&gb)
                .map(|(ra, rb)| ra.iter().zip(rb).map(|(x, y)| x - y).collect())
                .collect())
        },
    },
    FamilyInfo {
        name: "gabor",
        params: &[
            ParamInfo { name: "sigma", default: Some(2.0), meaning: "envelope standard deviation in pixels" },
            ParamInfo { name: "theta", default: Some(0.0), meaning: "orientation in degrees (0: stripes vertical, responds to x changes)" },
            ParamInfo { name: "wavelength", default: Some(4.0), meaning: "carrier wavelength in pixels" },
            ParamInfo { name: "aspect", default: Some(0.5), meaning: "spatial aspect ratio γ of the envelope" },
            ParamInfo { name: "phase", default: Some(0.0), meaning: "carrier phase in degrees (0 even, 90 odd)" },
            ParamInfo {
                name: "radius",
                default: None,
                meaning: "half-width in taps; default ceil(3·sigma/min(aspect, 1))",
            },
        ],
        summary: "exp(−(x'²+γ²y'²)/2σ²)·cos(2πx'/λ + ψ), x' = x cosθ + y sinθ, y' = −x sinθ + y cosθ",
        source: "Daugman, J. Opt. Soc. Am. A 2(7), 1985; parametrisation of Petkov & Kruizinga, Biol. Cybern. 76, 1997",
        build: |p| {
            let sigma = p.positive("sigma")?;
            let theta = p.finite("theta")?.to_radians();
            let lambda = p.positive("wavelength")?;
            let gamma = p.positive("aspect")?;
            let psi = p.finite("phase")?.to_radians();
            let r = p.radius(sigma / gamma.min(1.0), 3.0)? as isize;
            let (st, ct) = theta.sin_cos();
            Ok((-r..=r)
                .map(|y| {
                    (-r..=r)
                        .map(|x| {
                            let (x, y) = (x as f64, y as f64);
                            let xp = x * ct + y * st;
                            let yp = -x * st + y * ct;
                            (-(xp * xp + gamma * gamma * yp * yp) / (2.0 * sigma * sigma)).exp()
                                * (2.0 * std::f64::consts::PI * xp / lambda + psi).cos()
                        })
                        .collect()
                })
                .collect())
        },
    },
];

/// The family of this name.
pub fn find(name: &str) -> Option<&'static FamilyInfo> {
    FAMILIES.iter().find(|f| f.name == name)
}

/// Edit distance (Levenshtein), for "did you mean" hints.
pub fn edit_distance(a: &str, b: &str) -> usize {
    let b: Vec<char> = b.chars().collect();
    let mut prev: Vec<usize> = (0..=b.len()).collect();
    for (i, ca) in a.chars().enumerate() {
        let mut cur = vec![i + 1; b.len() + 1];
        for (j, cb) in b.iter().enumerate() {
            cur[j + 1] = (prev[j] + usize::from(ca != *cb))
                .min(prev[j + 1] + 1)
                .min(cur[j] + 1);
        }
        prev = cur;
    }
    prev[b.len()]
}

/// `"; near names: a, b"` for the names close to `wanted`, or an empty string.
pub fn near_names_hint<'a>(wanted: &str, names: impl Iterator<Item = &'a str>) -> String {
    let mut near: Vec<(usize, &str)> = names
        .map(|n| (edit_distance(wanted, n), n))
        .filter(|(d, n)| *d <= 2.max(wanted.len() / 3) || n.contains(wanted) || wanted.contains(*n))
        .collect();
    near.sort();
    if near.is_empty() {
        String::new()
    } else {
        let list: Vec<&str> = near.iter().take(5).map(|(_, n)| *n).collect();
        format!("; near names: {}", list.join(", "))
    }
}
