//! The optimizer: AdamW over the flat parameter vector, the learning-rate
//! schedule, per-parameter groups, and gradient clipping.

use crate::flow::{Flow, Workers};
use crate::simd::elementwise;

/// Adam (Kingma & Ba 2015) with decoupled weight decay (Loshchilov & Hutter
/// 2019) over the flat parameter vector, in one fused pass. Its whole state
/// (moments and step count) is saved in checkpoints.
#[derive(Clone)]
pub struct Adam {
    pub m: Vec<f32>,
    pub v: Vec<f32>,
    pub t: u64,
}

impl Adam {
    const BETA1: f32 = 0.9;
    const BETA2: f32 = 0.999;
    const EPS: f32 = 1e-8;

    pub fn new(n: usize) -> Adam {
        Adam { m: vec![0.0; n], v: vec![0.0; n], t: 0 }
    }

    /// One update; `groups` says which parameters take weight decay and
    /// scales each one's step.
    pub fn step(&mut self, params: &mut [f32], grad: &[f32], lr: f64, weight_decay: f64, groups: &ParamGroups) {
        let (step, eps, shrink) = self.advance(lr, weight_decay);
        adam_update(params, grad, &mut self.m, &mut self.v, &groups.decay, &groups.rate, step, eps, shrink);
    }

    /// [`Adam::step`] split over the workers' threads (same result).
    pub fn step_on(
        &mut self,
        workers: &Workers,
        params: &mut [f32],
        grad: &[f32],
        lr: f64,
        weight_decay: f64,
        groups: &ParamGroups,
    ) {
        let (step, eps, shrink) = self.advance(lr, weight_decay);
        workers.for_param_blocks(params, &mut self.m, &mut self.v, |at, p, m, v| {
            let n = p.len();
            let (decay, rate) = (&groups.decay[at..at + n], &groups.rate[at..at + n]);
            adam_update(p, &grad[at..at + n], m, v, decay, rate, step, eps, shrink);
        });
    }

    /// Count the step; the bias-corrected step size, epsilon and decay factor.
    fn advance(&mut self, lr: f64, weight_decay: f64) -> (f32, f32, f32) {
        self.t += 1;
        let c1 = 1.0 - (Self::BETA1 as f64).powi(self.t as i32);
        let c2 = 1.0 - (Self::BETA2 as f64).powi(self.t as i32);
        ((lr * c2.sqrt() / c1) as f32, Self::EPS * c2.sqrt() as f32, (lr * weight_decay) as f32)
    }
}

elementwise! {
    /// One AdamW update of a block of parameters with its moments.
    #[allow(clippy::too_many_arguments)]
    fn adam_update(
        p: &mut [f32],
        g: &[f32],
        m: &mut [f32],
        v: &mut [f32],
        decay: &[bool],
        rate: &[f32],
        step: f32,
        eps: f32,
        shrink: f32,
    ) {
        let (b1, b2) = (Adam::BETA1, Adam::BETA2);
        for (((((p, &g), m), v), &d), &r) in p.iter_mut().zip(g).zip(m).zip(v).zip(decay).zip(rate) {
            *m = b1 * *m + (1.0 - b1) * g;
            *v = b2 * *v + (1.0 - b2) * g * g;
            // Branch-free, so the loop vectorises.
            let decayed = *p - f32::from(u8::from(d)) * shrink * *p;
            *p = decayed - r * step * *m / (v.sqrt() + eps);
        }
    }
}

/// How AdamW treats each parameter: whether it takes weight decay, and a
/// multiplier of its step size.
pub struct ParamGroups {
    pub decay: Vec<bool>,
    pub rate: Vec<f32>,
}

impl ParamGroups {
    /// `n` parameters, all treated alike.
    pub fn uniform(n: usize, decay: bool) -> ParamGroups {
        ParamGroups { decay: vec![decay; n], rate: vec![1.0; n] }
    }

    /// A flow's parameters. Conditioner weight matrices take weight decay;
    /// biases, ActNorm and LU mixing do not (common practice). LU blocks
    /// step at `lu_rate` of the learning rate (by default [`lu_rate`]).
    pub fn for_flow(flow: &Flow, lu_rate: f32) -> ParamGroups {
        let mut groups = ParamGroups::uniform(flow.param_count(), false);
        let dim = flow.spec.dim;
        for slot in &flow.slots {
            for lin in &slot.linears {
                groups.decay[lin.weight..lin.weight + lin.out * lin.inp].fill(true);
            }
            if let Some(mix) = slot.mix {
                groups.rate[mix..mix + dim * dim].fill(lu_rate);
            }
        }
        groups
    }
}

/// An LU block's learning rate as a fraction of the schedule's: 0.2 at
/// dim 384 (measured), scaled as 1 / dim, at most 1 (so dim <= 76 keeps the
/// full rate). Adam moves every entry by about the step size from the first
/// steps; a batch's gradient of W is close to rank one early on, so the signs
/// form a rank-one pattern and W moves by about dim step sizes in operator
/// norm. At the full rate W then swings while the conditioners are still
/// untrained, and at dim 384 validation NLL stalled for tens of epochs.
pub fn lu_rate(dim: usize) -> f32 {
    (0.2 * 384.0 / dim as f32).min(1.0)
}

/// Learning rate at `step` of `total`: linear warm-up, then cosine decay.
pub fn learning_rate(base: f64, step: usize, total: usize, warmup_fraction: f64) -> f64 {
    let warm = ((total as f64 * warmup_fraction).ceil() as usize).max(1);
    if step < warm {
        return base * (step + 1) as f64 / warm as f64;
    }
    let progress = (step - warm) as f64 / (total - warm).max(1) as f64;
    base * 0.5 * (1.0 + (std::f64::consts::PI * progress.min(1.0)).cos())
}

/// Scale `g`, whose global norm is `norm`, down to norm `max` when it is
/// longer.
pub(super) fn clip_norm(g: &mut [f32], norm: f64, max: f64) {
    if norm > max {
        let s = (max / norm) as f32;
        g.iter_mut().for_each(|v| *v *= s);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn schedule_warms_up_then_decays_to_zero() {
        let total = 1000;
        assert!((learning_rate(1e-3, 0, total, 0.02) - 1e-3 / 20.0).abs() < 1e-12);
        assert!((learning_rate(1e-3, 19, total, 0.02) - 1e-3).abs() < 1e-12);
        assert!(learning_rate(1e-3, 500, total, 0.02) < 1e-3);
        assert!(learning_rate(1e-3, 999, total, 0.02) < 1e-7);
    }

    /// Adam's first step moves every parameter by lr against the sign of
    /// its gradient (bias correction makes m/sqrt(v) = sign(g); Kingma & Ba).
    /// Decoupled weight decay then shrinks by lr * wd on top; a group's
    /// rate scales its step.
    #[test]
    fn adam_first_step_is_lr_times_sign_plus_decoupled_decay() {
        let mut groups = ParamGroups::uniform(4, false);
        groups.decay[2] = true;
        groups.rate[3] = 0.25;
        let mut p = vec![1.0f32; 4];
        let mut adam = Adam::new(4);
        adam.step(&mut p, &[0.5, -2.0, 1e-3, 3.0], 0.01, 0.5, &groups);
        for (v, want) in p.iter().zip([0.99, 1.01, 1.0 - 0.005 - 0.01, 1.0 - 0.0025]) {
            assert!((v - want).abs() < 1e-5, "{v} vs {want}");
        }
    }

    /// LU blocks step at their reduced rate, conditioner weights alone
    /// take decay, everything else is plain.
    #[test]
    fn lu_blocks_step_slower_and_weights_decay() {
        use crate::flow::{Coupling, FlowSpec, Mixing};
        let spec = FlowSpec {
            dim: 128,
            layers: 2,
            hidden: 16,
            depth: 1,
            clamp: 3.0,
            classes: 0,
            mixing: Mixing::Lu,
            coupling: Coupling::Affine,
        };
        let flow = Flow::new(spec, 1);
        let groups = ParamGroups::for_flow(&flow, lu_rate(128));
        assert_eq!((lu_rate(384), lu_rate(128), lu_rate(64)), (0.2, 0.6, 1.0));
        let (block, weight) = (flow.slots[1].mix.unwrap(), flow.slots[1].linears[0].weight);
        assert_eq!((groups.rate[block], groups.rate[block + 128 * 128 - 1], groups.rate[weight]), (0.6, 0.6, 1.0));
        assert_eq!(groups.rate.iter().filter(|&&r| r == 0.6).count(), 2 * 128 * 128);
        assert!(groups.decay[weight] && !groups.decay[block]);
    }
}
