//! The mixture kind and validated shrinkage against scikit-learn and scipy
//! (values from scripts/make_density_fixtures.py, tests/fixtures/density.json).

mod common;

use tidemark::data::Dataset;
use tidemark::mixture::em;
use tidemark::model::Kind;
use tidemark::train::{fit, FitOptions, Run};

fn density() -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(common::fixture("density.json")).unwrap()).unwrap()
}

/// `a` within `rel` of `b`, relative to `b` (a 1e-12 floor for values at zero).
fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * b.abs() + 1e-12
}

/// EM from the same initial responsibilities gives scikit-learn's
/// GaussianMixture weights, means, covariances and mean log-likelihood
/// after the same number of rounds, to 1e-6 relative.
#[test]
fn em_matches_scikit_learn_gaussian_mixture() {
    let want = &density()["mixture_em"];
    let x = common::floats(&want["x"]);
    let d = 4;
    let rows = x.len() / d;
    let resp = common::floats(&want["initial_responsibilities"]);
    let rounds = want["rounds"].as_u64().unwrap() as usize;
    let (fitted, report) = em(&x, rows, d, &resp, want["ridge"].as_f64().unwrap(), rounds, 0.0).unwrap();
    assert_eq!(report.iterations, rounds);
    let m = &fitted.mixture;
    for (a, b) in m.log_weights.iter().map(|w| w.exp()).zip(common::floats(&want["weights"])) {
        assert!(close(a, b, 1e-6), "weight {a} vs {b}");
    }
    for (a, b) in m.means.iter().zip(common::floats(&want["means"])) {
        assert!(close(*a, b, 1e-6), "mean {a} vs {b}");
    }
    for (a, b) in fitted.covariances.iter().zip(common::floats(&want["covariances"])) {
        assert!(close(*a, b, 1e-6), "covariance {a} vs {b}");
    }
    let ll = m.mean_log_density(&x, rows);
    let want_ll = want["mean_log_likelihood"].as_f64().unwrap();
    assert!(close(ll, want_ll, 1e-6), "mean log-likelihood {ll} vs {want_ll}");
    // The last E-step's value is scikit-learn's lower bound.
    let lb = want["lower_bound"].as_f64().unwrap();
    assert!(close(report.mean_log_likelihood, lb, 1e-6), "{} vs {lb}", report.mean_log_likelihood);
}

/// `--kind gaussian` with held-out rows picks the shrinkage intensity whose
/// held-out log-likelihood scipy ranks best (here neither 0 nor the
/// Ledoit-Wolf estimate), and scores the held-out rows with scipy's
/// log-density under that covariance.
#[test]
fn gaussian_shrinkage_is_chosen_on_held_out_rows() {
    let want = &density()["shrinkage_validation"];
    let train = Dataset::open(&common::fixture("wine_train40.npy"), None).unwrap();
    let held = Dataset::open(&common::fixture("wine_heldout.npy"), None).unwrap();
    let opts = FitOptions { kind: Some(Kind::Gaussian), quiet: true, threads: Some(1), ..FitOptions::default() };
    let model = tidemark::train::fit_run(&Run { val: Some(&held), ..Run::new(&train) }, &opts).unwrap();
    let best = want["best"].as_f64().unwrap();
    assert!(close(model.pre.shrinkage, best, 1e-9), "chose {} instead of {best}", model.pre.shrinkage);
    let ll = model.evaluate(&held, 1).log_likelihood;
    let mean = ll.iter().sum::<f64>() / ll.len() as f64;
    let want_ll = want["best_mean_log_likelihood"].as_f64().unwrap();
    assert!(close(mean, want_ll, 1e-5), "{mean} vs scipy {want_ll}");
    // Asking for Ledoit-Wolf gives scikit-learn's estimate.
    let lw = FitOptions { shrinkage: Some("ledoit-wolf".parse().unwrap()), ..opts };
    let model = tidemark::train::fit_run(&Run { val: Some(&held), ..Run::new(&train) }, &lw).unwrap();
    let want_lw = want["ledoit_wolf"].as_f64().unwrap();
    assert!(close(model.pre.shrinkage, want_lw, 1e-6), "{} vs {want_lw}", model.pre.shrinkage);
}

/// On rows drawn from a two-cluster mixture, `--kind mixture` keeps more
/// than one component and beats the single Gaussian on held-out rows; the
/// model file round-trips to the same log-likelihoods.
#[test]
fn mixture_kind_beats_one_gaussian_on_clustered_rows_and_round_trips() {
    let x = two_clusters();
    let opts = FitOptions { quiet: true, threads: Some(1), ..FitOptions::default() };
    let mixture = fit(&x, None, &FitOptions { kind: Some(Kind::Mixture), ..opts.clone() }).unwrap();
    let gaussian = fit(&x, None, &FitOptions { kind: Some(Kind::Gaussian), ..opts }).unwrap();
    let (tm, tg) = (&mixture.meta.training, &gaussian.meta.training);
    assert!(mixture.meta.mixture.as_ref().unwrap().components >= 2);
    assert!(
        tm.best_validation_nll < tg.best_validation_nll - 0.5,
        "{} vs {}",
        tm.best_validation_nll,
        tg.best_validation_nll
    );
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("m.safetensors");
    mixture.save(&path).unwrap();
    let back = tidemark::model::Model::load(&path).unwrap();
    assert_eq!(back.evaluate(&x, 1).log_likelihood, mixture.evaluate(&x, 1).log_likelihood);
}

/// 3,000 rows of 6 features: a third of them shifted by +5 in the first two
/// features, the rest by -2.5, standard normal noise.
fn two_clusters() -> Dataset {
    use rand::{rngs::StdRng, SeedableRng};
    use rand_distr::{Distribution, StandardNormal};
    let mut rng = StdRng::seed_from_u64(5);
    let d = 6;
    let data: Vec<f32> = (0..3000)
        .flat_map(|r| {
            let shift = if r % 3 == 0 { 5.0 } else { -2.5 };
            let v: Vec<f32> = (0..d)
                .map(|j| {
                    <StandardNormal as Distribution<f32>>::sample(&StandardNormal, &mut rng)
                        + if j < 2 { shift } else { 0.0 }
                })
                .collect();
            v
        })
        .collect();
    Dataset::in_memory(tidemark::data::Matrix::new(3000, d, data))
}

/// A kind's own option without a kind fits exactly that kind, with no
/// search: `--components K` one mixture of K components, `--shrinkage A`
/// one Gaussian shrunk by A; both together name no one kind.
#[test]
fn a_kinds_own_option_fits_that_kind_alone() {
    let x = two_clusters();
    let opts = FitOptions { quiet: true, threads: Some(1), ..FitOptions::default() };
    let mixture = fit(&x, None, &FitOptions { components: Some(3), ..opts.clone() }).unwrap();
    assert_eq!(mixture.meta.kind, Kind::Mixture);
    assert_eq!(mixture.meta.mixture.as_ref().unwrap().components, 3);
    assert!(mixture.meta.training.candidates.is_empty());
    let shrink = || Some("0.25".parse().unwrap());
    let gaussian = fit(&x, None, &FitOptions { shrinkage: shrink(), ..opts.clone() }).unwrap();
    assert_eq!(gaussian.meta.kind, Kind::Gaussian);
    assert_eq!(gaussian.pre.shrinkage, 0.25);
    assert!(gaussian.meta.training.candidates.is_empty());
    let both = fit(&x, None, &FitOptions { components: Some(3), shrinkage: shrink(), ..opts }).unwrap_err();
    assert!(both.to_string().contains("give one"), "{both}");
}

/// The `component` and `component_probability` scores of a two-component
/// mixture on the two clusters: every row's most responsible component is
/// its own cluster's (the clusters sit 7.5 standard deviations apart in two
/// features, so the Bayes error is about 1e-7), one component per cluster,
/// and the posterior is a probability of at least one half that is near 1
/// for all but the rows between the clusters.
#[test]
fn mixture_components_name_each_rows_cluster() {
    let x = two_clusters();
    let opts = FitOptions { components: Some(2), quiet: true, threads: Some(1), ..FitOptions::default() };
    let model = fit(&x, None, &opts).unwrap();
    let e = model.evaluate(&x, 1);
    // Row 0 is in the first cluster, row 1 in the second.
    let of_cluster = [e.component[0], e.component[1]];
    assert_ne!(of_cluster[0], of_cluster[1]);
    for r in 0..x.rows {
        let cluster = if r % 3 == 0 { 0 } else { 1 };
        assert_eq!(e.component[r], of_cluster[cluster], "row {r}");
        assert!((0.5..=1.0).contains(&e.component_probability[r]), "row {r}: {}", e.component_probability[r]);
    }
    let sure = e.component_probability.iter().filter(|&&p| p > 0.999).count();
    assert!(sure as f64 >= 0.99 * x.rows as f64, "{sure} of {}", x.rows);
}

/// A stop (Ctrl-C, SIGTERM) already raised ends a mixture fit as
/// interrupted before its first component count, not after the ladder.
#[test]
fn a_raised_stop_interrupts_the_mixture() {
    let x = two_clusters();
    let stop = std::sync::atomic::AtomicBool::new(true);
    let opts = FitOptions { kind: Some(Kind::Mixture), quiet: true, threads: Some(1), ..FitOptions::default() };
    let err = tidemark::train::fit_run(&Run { stop: Some(&stop), ..Run::new(&x) }, &opts).unwrap_err();
    assert!(matches!(&err, tidemark::error::Error::Interrupted(m) if m.contains("while fitting the mixture")), "{err}");
}

/// Six well-separated Gaussian clusters: the doubling ladder (1, 2, 4, 8,
/// ...) holds no 6, and the counts tried halfway between its steps find
/// the true number of components.
#[test]
fn mixture_finds_a_component_count_between_powers_of_two() {
    use rand::{rngs::StdRng, SeedableRng};
    use rand_distr::{Distribution, StandardNormal};
    let mut rng = StdRng::seed_from_u64(8);
    let (d, n) = (12, 1200);
    // Cluster c sits 12 standard deviations out along +-axis c / 2.
    let data: Vec<f32> = (0..n)
        .flat_map(|r| {
            let c = r % 6;
            let v: Vec<f32> = (0..d)
                .map(|j| {
                    let at = if j == c / 2 {
                        if c % 2 == 0 {
                            12.0
                        } else {
                            -12.0
                        }
                    } else {
                        0.0
                    };
                    <StandardNormal as Distribution<f32>>::sample(&StandardNormal, &mut rng) + at
                })
                .collect();
            v
        })
        .collect();
    let x = Dataset::in_memory(tidemark::data::Matrix::new(n, d, data));
    let opts = FitOptions { quiet: true, threads: Some(1), kind: Some(Kind::Mixture), ..FitOptions::default() };
    let model = fit(&x, None, &opts).unwrap();
    assert_eq!(model.meta.mixture.as_ref().unwrap().components, 6);
}

/// A mixture model file whose tensors were altered (and its checksum
/// dropped, as in files from before checksums) is refused with a message
/// naming what is wrong, never a panic: weights that are not
/// log-probabilities, a precision factor that is not upper triangular, a
/// component count the tensors do not have.
#[test]
fn altered_mixture_files_are_refused_by_name() {
    use safetensors::tensor::TensorView;
    use safetensors::SafeTensors;
    let data: Vec<f32> = (0..400 * 3).map(|i| ((i * 7919 % 1000) as f32 / 300.0) + (i % 3) as f32).collect();
    let x = Dataset::in_memory(tidemark::data::Matrix::new(400, 3, data));
    let opts = FitOptions { kind: Some(Kind::Mixture), components: Some(2), quiet: true, ..FitOptions::default() };
    let model = fit(&x, None, &opts).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let good = dir.path().join("good.safetensors");
    model.save(&good).unwrap();
    let bytes = std::fs::read(&good).unwrap();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    let (_, header) = SafeTensors::read_metadata(&bytes).unwrap();
    let metadata = header.metadata().clone();
    let rewrite = |name: &str, change: &dyn Fn(&mut Vec<f64>), meta: &dyn Fn(String) -> String| {
        let mut owned: Vec<(String, safetensors::Dtype, Vec<usize>, Vec<u8>)> = Vec::new();
        for (n, t) in st.tensors() {
            if n == "tidemark.checksum" {
                continue;
            }
            let mut data = t.data().to_vec();
            if n == name {
                let mut v: Vec<f64> = data.chunks(8).map(|c| f64::from_le_bytes(c.try_into().unwrap())).collect();
                change(&mut v);
                data = v.iter().flat_map(|f| f.to_le_bytes()).collect();
            }
            owned.push((n, t.dtype(), t.shape().to_vec(), data));
        }
        let views: Vec<(String, TensorView)> =
            owned.iter().map(|(n, d, s, b)| (n.clone(), TensorView::new(*d, s.clone(), b).unwrap())).collect();
        let mut m = metadata.clone().unwrap();
        let key = "tidemark".to_string();
        m.insert(key.clone(), meta(m[&key].clone()));
        let path = dir.path().join(format!("bad_{}.safetensors", name.replace('.', "_")));
        std::fs::write(&path, safetensors::serialize(views, Some(m)).unwrap()).unwrap();
        tidemark::model::Model::load(&path).map(|_| ()).unwrap_err().to_string()
    };
    let same = |s: String| s;
    let err = rewrite("mixture.log_weights", &|v| v[0] += 1.0, &same);
    assert!(err.contains("log_weights"), "{err}");
    let err = rewrite("mixture.precision_cholesky", &|v| v[3] = 0.5, &same);
    assert!(err.contains("not upper triangular"), "{err}");
    let err = rewrite("mixture.means", &|_| (), &|m| m.replace("\"components\":2", "\"components\":3"));
    assert!(err.contains("mixture."), "{err}");
}

/// With labels and one component per class, the mixture is
/// sum_c pi_c N(x; m_c, S_c + r S) in input space: on held-out wine rows
/// it picks the ridge r that scipy ranks best and gives scipy's per-class
/// log-likelihoods, log-likelihood, most probable class and posterior
/// (scripts/make_density_fixtures.py); the file round-trips with its
/// classes.
#[test]
fn class_mixture_matches_scipy_per_class_gaussians() {
    let want = &density()["class_mixture"];
    let train = Dataset::open(&common::fixture("wine_class_train.npy"), None).unwrap();
    let held = Dataset::open(&common::fixture("wine_class_heldout.npy"), None).unwrap();
    let labels: Vec<i64> = want["train_labels"].as_array().unwrap().iter().map(|v| v.as_i64().unwrap()).collect();
    let opts = FitOptions {
        kind: Some(Kind::Mixture),
        components: Some(1),
        quiet: true,
        threads: Some(1),
        ..FitOptions::default()
    };
    let run = Run { val: Some(&held), labels: Some(&labels), ..Run::new(&train) };
    let model = tidemark::train::fit_run(&run, &opts).unwrap();
    let mm = model.meta.mixture.as_ref().unwrap();
    assert_eq!(mm.per_class, vec![1, 1, 1]);
    let best = want["best_ridge"].as_f64().unwrap();
    assert!(close(mm.ridge, best, 1e-9), "chose ridge {} instead of scipy's {best}", mm.ridge);
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("classes.safetensors");
    model.save(&path).unwrap();
    let back = tidemark::model::Model::load(&path).unwrap();
    assert_eq!(back.meta.format_version, 4);
    let e = back.evaluate(&held, 1);
    let per_class = common::floats(&want["class_log_likelihood"]);
    assert_eq!(e.class_log_likelihood.len(), per_class.len());
    for (a, b) in e.class_log_likelihood.iter().zip(&per_class) {
        assert!(close(*a, *b, 1e-5), "class log-likelihood {a} vs scipy {b}");
    }
    for (a, b) in e.log_likelihood.iter().zip(common::floats(&want["log_likelihood"])) {
        assert!(close(*a, b, 1e-5), "log-likelihood {a} vs scipy {b}");
    }
    let classes: Vec<usize> =
        want["predicted_class"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap() as usize).collect();
    assert_eq!(e.predicted_class, classes);
    for (a, b) in e.class_probability.iter().zip(common::floats(&want["class_probability"])) {
        assert!((a - b).abs() < 1e-5, "posterior {a} vs scipy {b}");
    }
    // Every component moved to class 0 (checksum dropped, as in files from
    // before checksums): class 0's weights no longer sum to its prior.
    let bad = dir.path().join("moved.safetensors");
    rewrite_tensor(&path, &bad, "mixture.component_class", &|b| b.iter_mut().for_each(|v| *v = 0));
    let err = tidemark::model::Model::load(&bad).map(|_| ()).unwrap_err().to_string();
    assert!(err.contains("mixture.component_class") && err.contains("class 0"), "{err}");
}

/// `from` with tensor `name`'s bytes changed by `change` and the checksum
/// tensor left out, written to `to`.
fn rewrite_tensor(from: &std::path::Path, to: &std::path::Path, name: &str, change: &dyn Fn(&mut Vec<u8>)) {
    use safetensors::tensor::TensorView;
    use safetensors::SafeTensors;
    let bytes = std::fs::read(from).unwrap();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    let (_, header) = SafeTensors::read_metadata(&bytes).unwrap();
    let mut owned = Vec::new();
    for (n, t) in st.tensors() {
        if n == "tidemark.checksum" {
            continue;
        }
        let mut data = t.data().to_vec();
        if n == name {
            change(&mut data);
        }
        owned.push((n, t.dtype(), t.shape().to_vec(), data));
    }
    let views: Vec<(String, TensorView)> =
        owned.iter().map(|(n, d, s, b)| (n.clone(), TensorView::new(*d, s.clone(), b).unwrap())).collect();
    std::fs::write(to, safetensors::serialize(views, header.metadata().clone()).unwrap()).unwrap();
}
