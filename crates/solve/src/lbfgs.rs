//! L-BFGS over the dense field through the argmin crate.
//!
//! The field is handed to argmin as a plain `Vec<f32>` (component-first voxels), so argmin
//! needs no array backend of its own. Reference: "On the limited memory BFGS method for
//! large scale optimization", Mathematical Programming 1989; line search: "Line search
//! algorithms with guaranteed sufficient decrease", ACM TOMS 1994.

use std::sync::Mutex;

use argmin::core::{CostFunction, Error, Executor, Gradient, State};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::quasinewton::LBFGS;

/// The objective as argmin sees it: `eval(θ, ∂E/∂θ) -> E`, behind a lock because argmin
/// takes `&self`; the last evaluation is cached because argmin asks for the cost and the
/// gradient of the same point separately.
struct Objective<'a> {
    inner: Mutex<Inner<'a>>,
}

type EvalFn<'a> = dyn FnMut(&[f32], &mut [f32]) -> f64 + Send + 'a;

struct Inner<'a> {
    eval: &'a mut EvalFn<'a>,
    param: Vec<f32>,
    cost: f64,
    grad: Vec<f32>,
    valid: bool,
}

impl Inner<'_> {
    fn ensure(&mut self, p: &[f32]) {
        if !self.valid || self.param.as_slice() != p {
            self.cost = (self.eval)(p, &mut self.grad);
            self.param.clear();
            self.param.extend_from_slice(p);
            self.valid = true;
        }
    }
}

impl CostFunction for Objective<'_> {
    type Param = Vec<f32>;
    type Output = f32;
    fn cost(&self, p: &Self::Param) -> Result<f32, Error> {
        let mut inner = self.inner.lock().expect("no poisoned lock");
        inner.ensure(p);
        Ok(inner.cost as f32)
    }
}

impl Gradient for Objective<'_> {
    type Param = Vec<f32>;
    type Gradient = Vec<f32>;
    fn gradient(&self, p: &Self::Param) -> Result<Vec<f32>, Error> {
        let mut inner = self.inner.lock().expect("no poisoned lock");
        inner.ensure(p);
        Ok(inner.grad.clone())
    }
}

/// Outcome of [`minimise`].
pub struct LbfgsOutcome {
    /// The best parameters found.
    pub param: Vec<f32>,
    /// Iterations done.
    pub iterations: usize,
}

/// Runs L-BFGS (memory 5) from `init` for at most `max_iters` iterations, stopping when the
/// relative cost change falls below `tol`; `eval(θ, g)` returns the cost and writes the
/// gradient into `g`.
pub fn minimise<'a>(
    init: Vec<f32>,
    max_iters: usize,
    tol: f64,
    eval: &'a mut EvalFn<'a>,
) -> Result<LbfgsOutcome, String> {
    let n = init.len();
    let obj = Objective {
        inner: Mutex::new(Inner { eval, param: Vec::with_capacity(n), cost: 0.0, grad: vec![0.0; n], valid: false }),
    };
    let linesearch = MoreThuenteLineSearch::new();
    let solver = LBFGS::new(linesearch, 5)
        .with_tolerance_cost(tol as f32)
        .map_err(|e| e.to_string())?
        .with_tolerance_grad(1e-10)
        .map_err(|e| e.to_string())?;
    let res = Executor::new(obj, solver)
        .configure(|state| state.param(init).max_iters(max_iters as u64))
        .run()
        .map_err(|e| e.to_string())?;
    let iterations = res.state().get_iter() as usize;
    let param = res.state().get_best_param().cloned().ok_or("L-BFGS returned no parameters")?;
    Ok(LbfgsOutcome { param, iterations })
}
