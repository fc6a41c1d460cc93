//! The default `fit` chooses the density on the validation rows.

use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use tidemark::data::{Dataset, Matrix};
use tidemark::model::Kind;
use tidemark::train::{fit, FitOptions};

fn normal(rng: &mut StdRng) -> f32 {
    StandardNormal.sample(rng)
}

fn opts() -> FitOptions {
    FitOptions { quiet: true, threads: Some(2), seed: Some(4), ..FitOptions::default() }
}

/// Rows from one correlated Gaussian (x = A e, e standard normal): the
/// Gaussian is the true density, and nothing more flexible is clearly
/// better on held-out rows, so the Gaussian is kept.
#[test]
fn gaussian_data_keeps_the_gaussian() {
    let mut rng = StdRng::seed_from_u64(1);
    let d = 5;
    let data: Vec<f32> = (0..3000)
        .flat_map(|_| {
            let e: Vec<f32> = (0..d).map(|_| normal(&mut rng)).collect();
            (0..d).map(|i| e[..=i].iter().sum::<f32>() * (i + 1) as f32).collect::<Vec<_>>()
        })
        .collect();
    let model = fit(&Dataset::in_memory(Matrix::new(3000, d, data)), None, &opts()).unwrap();
    let names: Vec<Kind> = model.meta.training.candidates.iter().map(|c| c.kind).collect();
    assert_eq!(names, vec![Kind::Gaussian, Kind::Mixture, Kind::Flow]);
    assert_eq!(model.meta.kind, Kind::Gaussian, "{:?}", model.meta.training.candidates);
}

/// Rows on a curved ridge in 8 dimensions (x_{2i+1} = x_{2i}^2 + small
/// noise): no Gaussian fits it, and the chosen density beats the Gaussian
/// candidate by a wide margin on held-out rows.
#[test]
fn curved_data_leaves_the_gaussian() {
    let mut rng = StdRng::seed_from_u64(2);
    let d = 8;
    let data: Vec<f32> = (0..4000)
        .flat_map(|_| {
            (0..d / 2)
                .flat_map(|_| {
                    let a = normal(&mut rng);
                    [a, a * a + 0.1 * normal(&mut rng)]
                })
                .collect::<Vec<_>>()
        })
        .collect();
    let model = fit(&Dataset::in_memory(Matrix::new(4000, d, data)), None, &opts()).unwrap();
    let c = &model.meta.training.candidates;
    let gaussian = c.iter().find(|c| c.kind == Kind::Gaussian).unwrap().validation_nll;
    assert_ne!(model.meta.kind, Kind::Gaussian, "{c:?}");
    assert!(model.meta.training.best_validation_nll < gaussian - 2.0, "{c:?}");
}
