//! Activation stages, applied to every sample of every map:
//! relu max(0, x); leaky-relu x for x ≥ 0, slope·x otherwise; abs |x|; square x²;
//! tanh; sigmoid 1/(1 + e^(−x)). (Goodfellow, Bengio & Courville, Deep Learning,
//! 2016, §6.3; common practice.)

use std::fmt;
use std::str::FromStr;

/// An element-wise activation.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Activation {
    /// x.
    None,
    /// max(0, x).
    Relu,
    /// x for x ≥ 0, slope·x otherwise.
    LeakyRelu(f32),
    /// |x|.
    Abs,
    /// x².
    Square,
    /// tanh x.
    Tanh,
    /// 1 / (1 + e^(−x)).
    Sigmoid,
}

/// Default slope of `leaky-relu` (common practice, no source).
pub const DEFAULT_LEAK: f32 = 0.01;

impl Activation {
    /// Applies the activation in place.
    pub fn apply(self, data: &mut [f32]) {
        match self {
            Activation::None => {}
            Activation::Relu => data.iter_mut().for_each(|v| *v = v.max(0.0)),
            Activation::LeakyRelu(a) => data
                .iter_mut()
                .for_each(|v| *v = if *v >= 0.0 { *v } else { a * *v }),
            Activation::Abs => data.iter_mut().for_each(|v| *v = v.abs()),
            Activation::Square => data.iter_mut().for_each(|v| *v *= *v),
            Activation::Tanh => data.iter_mut().for_each(|v| *v = v.tanh()),
            Activation::Sigmoid => data.iter_mut().for_each(|v| *v = 1.0 / (1.0 + (-*v).exp())),
        }
    }

    /// True when every output is ≥ 0 whatever the input (relu, abs, square, sigmoid).
    pub fn non_negative(self) -> bool {
        matches!(
            self,
            Activation::Relu | Activation::Abs | Activation::Square | Activation::Sigmoid
        )
    }
}

impl fmt::Display for Activation {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Activation::None => f.write_str("none"),
            Activation::Relu => f.write_str("relu"),
            Activation::LeakyRelu(a) => write!(f, "leaky-relu:{a}"),
            Activation::Abs => f.write_str("abs"),
            Activation::Square => f.write_str("square"),
            Activation::Tanh => f.write_str("tanh"),
            Activation::Sigmoid => f.write_str("sigmoid"),
        }
    }
}

impl FromStr for Activation {
    type Err = String;
    /// `none`, `relu`, `leaky-relu` or `leaky-relu:SLOPE`, `abs`, `square`, `tanh`, `sigmoid`.
    fn from_str(s: &str) -> Result<Self, String> {
        let (name, arg) = s.split_once(':').map_or((s, None), |(a, b)| (a, Some(b)));
        let no_arg = |a: Activation| match arg {
            None => Ok(a),
            Some(_) => Err(format!("activation '{name}' takes no parameter")),
        };
        match name {
            "none" => no_arg(Activation::None),
            "relu" => no_arg(Activation::Relu),
            "abs" => no_arg(Activation::Abs),
            "square" => no_arg(Activation::Square),
            "tanh" => no_arg(Activation::Tanh),
            "sigmoid" => no_arg(Activation::Sigmoid),
            "leaky-relu" => {
                let slope = match arg {
                    None => DEFAULT_LEAK,
                    Some(a) => a
                        .parse::<f32>()
                        .ok()
                        .filter(|v| v.is_finite())
                        .ok_or_else(|| format!("leaky-relu slope '{a}' is not a finite number"))?,
                };
                Ok(Activation::LeakyRelu(slope))
            }
            other => Err(format!(
                "unknown activation '{other}'; expected none, relu, leaky-relu[:SLOPE], abs, square, tanh or sigmoid"
            )),
        }
    }
}
