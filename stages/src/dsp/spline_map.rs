//! The set-up the spherical-spline ops share (`laplacian`, `interpolate`): the spline params'
//! defaults and checks, and a map of channels fitted from electrode positions (the formulas
//! are in [`crate::spatial::splines`]: Perrin, Pernier, Bertrand & Echallier 1989,
//! Electroencephalogr Clin Neurophysiol 72:184–187; erratum 1990, 76:565).

use ndarray::ArrayD;

use crate::array::{LabelledArray, Layout};
use crate::dsp::recording::refuse_non_finite;
use crate::error::StageError;
use crate::spatial::splines::Spline;
use crate::spatial::{apply_to_channels, spline_positions};

/// Spline order m (common practice: the value most studies use).
pub(crate) fn default_m() -> u32 {
    4
}

/// Regularisation λ (common practice).
pub(crate) fn default_lambda() -> f64 {
    1e-5
}

/// Number of Legendre terms (common practice).
pub(crate) fn default_terms() -> usize {
    50
}

/// Checks of the spline params, each error at its field. m ≥ 2: h_m's series has terms
/// (2n+1)/(n(n+1))^(m−1), which do not decay for m = 1.
pub(crate) fn check_spline(m: u32, lambda: f64, terms: usize) -> Result<Spline, StageError> {
    if !(2..=10).contains(&m) {
        return Err(StageError::param(
            "m",
            format!("the spline order must be between 2 and 10, found {m}"),
        ));
    }
    if !(lambda.is_finite() && lambda >= 0.0) {
        return Err(StageError::param(
            "lambda",
            format!("expected a number ≥ 0, found {lambda}"),
        ));
    }
    if !(1..=1000).contains(&terms) {
        return Err(StageError::param(
            "terms",
            format!("expected between 1 and 1000 Legendre terms, found {terms}"),
        ));
    }
    Ok(Spline { m, lambda, terms })
}

/// An op's output as a linear map of its input's channels: the channels `to` become `matrix`
/// (`to.len()` × `from.len()`, row-major) times the channels `from`; every other channel passes
/// through. Planned once from the layouts, applied to the values.
pub(crate) struct SplineMap {
    /// The output layout.
    pub layout: Layout,
    matrix: Vec<f64>,
    from: Vec<usize>,
    to: Vec<usize>,
}

impl SplineMap {
    /// Fit the map of channel rows `from` onto rows `to` of `input` (whose channel names are
    /// `names`): their positions are checked and projected on the unit sphere
    /// ([`spline_positions`], errors naming `op`), rows of `to` not in `from` checked together
    /// with `from`; `fit` computes the matrix from the positions of `from` and of `to`, and
    /// `None` (a singular spline system) is reported at `lambda`.
    pub fn fit(
        input: &Layout,
        names: &[String],
        (from, to): (Vec<usize>, Vec<usize>),
        layout: Layout,
        op: &str,
        fit: impl FnOnce(&[[f64; 3]], &[[f64; 3]]) -> Option<Vec<f64>>,
    ) -> Result<SplineMap, StageError> {
        let from_at = spline_positions(input, names, &from, op)?;
        let to_at = if to == from {
            from_at.clone()
        } else {
            let all: Vec<usize> = from.iter().chain(&to).copied().collect();
            spline_positions(input, names, &all, op)?.split_off(from.len())
        };
        let matrix = fit(&from_at, &to_at).ok_or_else(|| {
            StageError::param(
                "lambda",
                "the spline system is singular for these positions; use a lambda above 0",
            )
        })?;
        Ok(SplineMap {
            layout,
            matrix,
            from,
            to,
        })
    }

    /// The map that changes no channel.
    pub fn pass_through(layout: Layout) -> SplineMap {
        SplineMap {
            layout,
            matrix: Vec::new(),
            from: Vec::new(),
            to: Vec::new(),
        }
    }

    /// The channels the map replaces.
    pub fn to(&self) -> &[usize] {
        &self.to
    }

    /// The output for the input's `values` (whose channel and time axes are the output
    /// layout's). A non-finite sample in a channel the map reads is refused
    /// ([`refuse_non_finite`]): it would reach every channel the map computes.
    pub fn apply(self, values: &ArrayD<f32>) -> Result<LabelledArray, StageError> {
        refuse_non_finite(
            values,
            &self.layout,
            self.from.iter().copied(),
            "the spline computes channels from every channel it reads at each time and would \
             spread it into them",
            "replace it first (mark the channel bad and run interpolate, which does not read \
             the channels it replaces, or clean the recording)",
        )?;
        let out = apply_to_channels(values, &self.matrix, &self.from, &self.to);
        LabelledArray::real(self.layout, out)
    }
}
