//! The certified radius of one sample: the largest epsilon scale the sound bounds prove (a lower bound
//! on the robust radius, in epsilon units), by doubling then bisection.

use super::pipeline::Context;
use super::report::Status;
use super::CertifyError;
use crate::bound;

/// True when the sound bounds (interval, then the configured linear methods) certify the region at
/// `scale`.
fn bounds_certify(
    context: &Context,
    x: &[f64],
    label: usize,
    forbidden: &[usize],
    scale: f64,
) -> Result<bool, CertifyError> {
    let model = context.model;
    let region = context.requirement.budget(scale, model.input.dim).region(
        x,
        &model.input.lower,
        &model.input.upper,
    );
    let mut methods = vec![bound::Method::Interval];
    methods.extend(context.options.methods.iter().copied());
    for method in methods {
        let result =
            bound::margin_lower_bounds(&context.network, &region, label, forbidden, method, None)
                .map_err(|e| CertifyError::Bound {
                index: usize::MAX,
                message: e.to_string(),
            })?;
        if result.certified() {
            return Ok(true);
        }
    }
    Ok(false)
}

/// Bisection steps of the radius search.
const RADIUS_STEPS: usize = 12;

/// Largest scale proven by the sound bounds: starts from the largest epsilon already certified
/// (`statuses[k]` is the outcome at the sweep's epsilon `k`), stops below the smallest with a
/// counterexample, otherwise doubles until the bounds fail, then bisects.
pub(crate) fn certified_radius(
    context: &Context,
    x: &[f64],
    label: usize,
    forbidden: &[usize],
    statuses: &[Status],
) -> Result<f64, CertifyError> {
    let epsilons = &context.requirement.epsilons;
    let mut low = 0.0;
    let mut high: Option<f64> = None;
    for (status, &eps) in statuses.iter().zip(epsilons) {
        match status {
            Status::Certified => low = eps,
            Status::Counterexample if high.is_none() => high = Some(eps),
            _ => {}
        }
    }
    if low == 0.0 && !bounds_certify(context, x, label, forbidden, 0.0)? {
        return Ok(0.0);
    }
    let mut high = match high {
        Some(h) => h,
        None => {
            let mut h = if low > 0.0 {
                low * 2.0
            } else {
                context.requirement.epsilon().max(1e-3)
            };
            let mut doublings = 0;
            while doublings < 10 && bounds_certify(context, x, label, forbidden, h)? {
                low = h;
                h *= 2.0;
                doublings += 1;
            }
            h
        }
    };
    for _ in 0..RADIUS_STEPS {
        let middle = 0.5 * (low + high);
        if bounds_certify(context, x, label, forbidden, middle)? {
            low = middle;
        } else {
            high = middle;
        }
    }
    Ok(low)
}
