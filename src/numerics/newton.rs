//! One damped Newton maximiser for smooth concave objectives: the gating network's
//! multinomial logit, the item logits and the Poisson regressions all use it.
//!
//! Each iteration takes the Newton step s = (−H)⁻¹ g and halves it until the objective
//! does not fall. It stops after the step whose Newton decrement g′s is below
//! 1e-12·(1 + |objective|) (that last step is kept unless it lowers the objective by more
//! than rounding, 1e-13·(1 + |objective|)), when halving cannot raise the objective, when
//! the Hessian cannot be solved, or at the iteration cap. Why it stopped is part of the
//! result ([`Outcome`]), never silently "converged".

use super::solve_spd;
use nalgebra::{DMatrix, DVector};

/// A concave objective to maximise.
pub trait Concave {
    /// The objective at `x`.
    fn objective(&self, x: &[f64]) -> f64;
    /// The objective, its gradient and its negative Hessian at `x`.
    fn derivatives(&self, x: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>);
}

/// What to do when the negative Hessian cannot be solved (it is not positive definite:
/// separation, or an empty category).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WhenSingular {
    /// Stop where the iteration stands.
    Stop,
    /// Add μI to the negative Hessian, μ growing tenfold from 1e-8·(1 + |its mean diagonal|)
    /// until it can be solved (Levenberg's damping); counted in [`NewtonFit::damped`].
    Damp,
}

/// Why the maximiser stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// The Newton decrement fell below its tolerance: a maximum within rounding.
    Converged,
    /// Halving the step down to 1e-10 of its length did not raise the objective, away
    /// from a maximum.
    LineSearchFailed,
    /// The negative Hessian could not be solved (even damped, with [`WhenSingular::Damp`]).
    SingularHessian,
    /// The iteration cap came first (inside EM, one step is all that is asked).
    IterationCap,
}

impl Outcome {
    /// Whether the maximiser stopped at a maximum.
    pub fn converged(self) -> bool {
        self == Outcome::Converged
    }

    /// Whether it stopped on a failure (not at a maximum, not at the cap it was given).
    pub fn failed(self) -> bool {
        matches!(self, Outcome::LineSearchFailed | Outcome::SingularHessian)
    }
}

/// The result of [`maximise`].
#[derive(Debug, Clone, PartialEq)]
pub struct NewtonFit {
    /// The last accepted point.
    pub x: Vec<f64>,
    /// The objective there (after a failure: at the last point whose derivatives were taken).
    pub objective: f64,
    /// Iterations begun.
    pub iterations: usize,
    /// Why it stopped.
    pub outcome: Outcome,
    /// Iterations whose negative Hessian needed damping.
    pub damped: usize,
}

/// Relative Newton decrement below which the iteration has converged.
const DECREMENT: f64 = 1e-12;
/// Relative rounding allowance: at the optimum a full step may "lose" a few ulps.
const SLACK: f64 = 1e-13;
/// Smallest step fraction tried before the line search gives up.
const SMALLEST_STEP: f64 = 1e-10;

/// Maximise `problem` from `start` with at most `max_iter` iterations. With
/// `max_iter = 1` it is one generalised-EM step: the objective does not fall.
pub fn maximise(problem: &impl Concave, start: &[f64], max_iter: usize, singular: WhenSingular) -> NewtonFit {
    let mut fit = NewtonFit {
        x: start.to_vec(),
        objective: f64::NEG_INFINITY,
        iterations: 0,
        outcome: Outcome::IterationCap,
        damped: 0,
    };
    for it in 1..=max_iter {
        fit.iterations = it;
        let (objective, score, neg) = problem.derivatives(&fit.x);
        fit.objective = objective;
        let Some(step) = newton_step(&neg, &score, singular, &mut fit.damped) else {
            fit.outcome = Outcome::SingularHessian;
            return fit;
        };
        let decrement = score.dot(&step);
        let tiny = decrement.abs() <= DECREMENT * (1.0 + objective.abs());
        let slack = if tiny { SLACK * (1.0 + objective.abs()) } else { 0.0 };
        let mut t = 1.0;
        loop {
            let trial: Vec<f64> = fit.x.iter().zip(step.iter()).map(|(a, b)| a + t * b).collect();
            let trial_objective = problem.objective(&trial);
            if trial_objective >= objective - slack {
                fit.x = trial;
                fit.objective = trial_objective;
                break;
            }
            if tiny {
                // The step is below rounding and does not help: this is the maximum.
                fit.outcome = Outcome::Converged;
                return fit;
            }
            t *= 0.5;
            if t < SMALLEST_STEP {
                fit.outcome = Outcome::LineSearchFailed;
                return fit;
            }
        }
        if tiny {
            fit.outcome = Outcome::Converged;
            return fit;
        }
    }
    fit
}

/// (−H)⁻¹ g, damped as `singular` says when −H cannot be solved.
fn newton_step(
    neg: &DMatrix<f64>,
    score: &DVector<f64>,
    singular: WhenSingular,
    damped: &mut usize,
) -> Option<DVector<f64>> {
    if let Some(s) = solve_spd(neg, score) {
        return Some(s);
    }
    if singular == WhenSingular::Stop {
        return None;
    }
    *damped += 1;
    let mut mu = 1e-8 * (1.0 + neg.trace().abs() / neg.nrows() as f64);
    loop {
        let mut m = neg.clone();
        for i in 0..m.nrows() {
            m[(i, i)] += mu;
        }
        if let Some(s) = solve_spd(&m, score) {
            return Some(s);
        }
        mu *= 10.0;
        if !mu.is_finite() {
            return None;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// −(x − 3)², and a line that has no maximum.
    struct Parabola;
    impl Concave for Parabola {
        fn objective(&self, x: &[f64]) -> f64 {
            -(x[0] - 3.0).powi(2)
        }
        fn derivatives(&self, x: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>) {
            (
                self.objective(x),
                DVector::from_element(1, -2.0 * (x[0] - 3.0)),
                DMatrix::from_element(1, 1, 2.0),
            )
        }
    }

    struct Flat;
    impl Concave for Flat {
        fn objective(&self, x: &[f64]) -> f64 {
            x[0]
        }
        fn derivatives(&self, x: &[f64]) -> (f64, DVector<f64>, DMatrix<f64>) {
            (x[0], DVector::from_element(1, 1.0), DMatrix::zeros(1, 1))
        }
    }

    #[test]
    fn outcomes_say_why_it_stopped() {
        let fit = maximise(&Parabola, &[0.0], 50, WhenSingular::Stop);
        assert_eq!(fit.outcome, Outcome::Converged);
        assert!((fit.x[0] - 3.0).abs() < 1e-12);
        let one = maximise(&Parabola, &[0.0], 1, WhenSingular::Stop);
        assert_eq!((one.outcome, one.iterations), (Outcome::IterationCap, 1));
        let flat = maximise(&Flat, &[0.0], 10, WhenSingular::Stop);
        assert_eq!(flat.outcome, Outcome::SingularHessian);
        let damped = maximise(&Flat, &[0.0], 3, WhenSingular::Damp);
        assert_eq!((damped.outcome, damped.damped), (Outcome::IterationCap, 3));
        assert!(damped.x[0] > 0.0, "a damped step still climbs");
    }
}
