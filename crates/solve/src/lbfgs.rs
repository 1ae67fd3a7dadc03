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

use crate::kernel::{Energy, Problem};

/// argmin's view of one level's objective; caches the last evaluation because argmin asks
/// for the cost and the gradient of the same point separately.
struct LevelObjective<'a> {
    problem: &'a Problem<'a>,
    cache: Mutex<Cache>,
}

struct Cache {
    param: Vec<f32>,
    energy: Energy,
    grad: Vec<f32>,
    sums: Vec<[f64; 2]>,
    evaluations: usize,
}

impl LevelObjective<'_> {
    fn eval(&self, p: &[f32]) -> (f32, Option<Vec<f32>>, bool) {
        let mut c = self.cache.lock().expect("no poisoned lock");
        let fresh = c.evaluations == 0 || c.param.as_slice() != p;
        if fresh {
            let Cache { grad, sums, .. } = &mut *c;
            let e = self.problem.evaluate(p, grad, sums);
            c.energy = e;
            c.param.clear();
            c.param.extend_from_slice(p);
            c.evaluations += 1;
        }
        (c.energy.total as f32, None, fresh)
    }
}

impl CostFunction for LevelObjective<'_> {
    type Param = Vec<f32>;
    type Output = f32;
    fn cost(&self, p: &Self::Param) -> Result<f32, Error> {
        Ok(self.eval(p).0)
    }
}

impl Gradient for LevelObjective<'_> {
    type Param = Vec<f32>;
    type Gradient = Vec<f32>;
    fn gradient(&self, p: &Self::Param) -> Result<Vec<f32>, Error> {
        self.eval(p);
        Ok(self.cache.lock().expect("no poisoned lock").grad.clone())
    }
}

/// Outcome of [`minimise`].
pub struct LbfgsOutcome {
    /// The best field found.
    pub param: Vec<f32>,
    /// Iterations done.
    pub iterations: usize,
    /// Objective evaluations (each is one pass of the fused kernel).
    pub evaluations: usize,
}

/// Runs L-BFGS (memory 5) from `init` for at most `max_iters` iterations, stopping when the
/// relative cost change falls below `tol`.
pub fn minimise(problem: &Problem, init: Vec<f32>, max_iters: usize, tol: f64) -> Result<LbfgsOutcome, String> {
    let n = init.len();
    let obj = LevelObjective {
        problem,
        cache: Mutex::new(Cache {
            param: Vec::with_capacity(n),
            energy: Energy::default(),
            grad: vec![0.0; n],
            sums: Vec::new(),
            evaluations: 0,
        }),
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
    let evaluations = res.problem().problem.as_ref().map_or(0, |p| p.cache.lock().map(|c| c.evaluations).unwrap_or(0));
    Ok(LbfgsOutcome { param, iterations, evaluations })
}
