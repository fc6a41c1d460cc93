//! The default `fit` chooses the density on the validation rows.

use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use tidemark::data::{Dataset, Matrix};
use tidemark::model::Kind;
use tidemark::train::{fit, Budget, FitOptions};

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
    let kinds: Vec<Kind> = model.meta.training.candidates.iter().map(|c| c.kind).collect();
    assert_eq!(kinds[..2], [Kind::Gaussian, Kind::Mixture]);
    assert!(kinds.len() > 4 && kinds[2..].iter().all(|&k| k == Kind::Flow), "{kinds:?}");
    assert_eq!(model.meta.kind, Kind::Gaussian, "{:?}", model.meta.training.candidates);
}

/// Rows on a curved ridge in 8 dimensions (x_{2i+1} = x_{2i}^2 + small
/// noise): no Gaussian fits it; a flow is chosen, and it beats the Gaussian
/// candidate by a wide margin on held-out rows.
#[test]
fn curved_data_chooses_a_flow() {
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
    assert_eq!(model.meta.kind, Kind::Flow, "{c:?}");
    assert!(model.meta.training.best_validation_nll < gaussian - 2.0, "{c:?}");
}

/// A budget spent at once still gives a model: the mixture stops after its
/// first component count, the settings table's flow runs its first stage
/// (so that a flow is compared), and every other flow is left out with the
/// budget as the reason.
#[test]
fn a_spent_budget_cuts_the_search_short() {
    let x = Dataset::in_memory(common::wavy(3000, 0.0));
    let model = fit(&x, None, &FitOptions { budget: Some(Budget(0.001)), ..opts() }).unwrap();
    let c = &model.meta.training.candidates;
    let mixture = c.iter().find(|c| c.kind == Kind::Mixture).unwrap();
    assert!(mixture.detail.starts_with("1 components,"), "{c:?}");
    let flows: Vec<_> = c.iter().filter(|c| c.kind == Kind::Flow).collect();
    assert!(flows.len() >= 6, "{c:?}");
    assert_eq!(flows.iter().filter(|c| c.stages.len() == 1).count(), 1, "{c:?}");
    let left_out = flows.iter().filter(|c| c.stages.is_empty());
    assert!(left_out.clone().count() == flows.len() - 1, "{c:?}");
    assert!(left_out.clone().all(|c| c.stopped == "budget spent before stage 1 of 3"), "{c:?}");
}

mod common;

/// A search killed outright (SIGKILL) while the flows race can be resumed
/// from the checkpoint it writes after every stage; stopped again by
/// SIGTERM it writes the checkpoint and the best density so far, and once
/// more in the local round; resumed to the end it gives the same model as
/// the uninterrupted search (same scores, bit for bit) and the same log.
#[test]
fn interrupted_search_resumes_to_the_same_model() {
    use std::io::{BufRead, BufReader};
    use std::process::{Command, Stdio};
    let dir = tempfile::tempdir().unwrap();
    let s = |p: &std::path::Path| p.to_str().unwrap().to_string();
    let train = dir.path().join("train.npy");
    common::save(&train, &common::wavy(3000, 0.0));
    let args = |out: &std::path::Path| {
        vec![
            "fit".to_string(),
            s(&train),
            "-o".into(),
            s(out),
            "--log".into(),
            s(&out.with_extension("jsonl")),
            "--budget".into(),
            "1h".into(),
            "--threads".into(),
            "2".into(),
        ]
    };
    let reference = dir.path().join("reference.safetensors");
    assert!(Command::new(common::bin()).args(args(&reference)).arg("-q").status().unwrap().success());
    check_search_log(&reference);

    let model = dir.path().join("model.safetensors");
    let checkpoint = dir.path().join("model.checkpoint.safetensors");
    let mut resume = args(&model);
    resume.extend(["--resume".to_string(), s(&checkpoint)]);
    // Run until `stop` holds for the count of flows that have finished a
    // stage and the last one's line, then send `signal`; the status, what
    // the run printed after that, and that line.
    let stop_after = |args: &[String], stop: &dyn Fn(usize, &str) -> bool, signal: &str| {
        let mut child = Command::new(common::bin()).args(args).stderr(Stdio::piped()).spawn().unwrap();
        let mut lines = BufReader::new(child.stderr.take().unwrap()).lines();
        let (mut seen, mut last) = (0, String::new());
        for line in lines.by_ref() {
            let line = line.unwrap();
            if line.starts_with("flow \"") {
                (seen, last) = (seen + 1, line);
                if stop(seen, &last) {
                    break;
                }
            }
        }
        common::send(child.id(), signal);
        let rest: Vec<String> = lines.map(|l| l.unwrap()).collect();
        (child.wait().unwrap(), rest, last)
    };
    let (killed, _, _) = stop_after(&args(&model), &|seen, _| seen == 2, "-KILL");
    assert_eq!(killed.code(), None, "SIGKILL ends the process without a status");
    assert!(checkpoint.exists(), "a search checkpoint is written after every stage");

    let (status, rest, _) = stop_after(&resume, &|seen, _| seen == 1, "-TERM");
    assert_eq!(status.code(), Some(130), "{rest:?}");
    assert!(checkpoint.exists() && model.exists(), "{rest:?}");
    assert!(rest.iter().any(|l| l.contains("--resume")), "{rest:?}");

    // The local round's flows are named "winner / change".
    let (status, rest, last) = stop_after(&resume, &|_, line| line.contains(" / "), "-TERM");
    assert_eq!(status.code(), Some(130), "{rest:?}");
    assert!(last.contains(" / "), "stopped before the local round: {last}");

    resume.push("-q".into());
    assert!(Command::new(common::bin()).args(resume).status().unwrap().success());
    assert!(!checkpoint.exists(), "a finished search removes its checkpoint");
    let scores = |m: &std::path::Path, name: &str| {
        let out = dir.path().join(name);
        assert!(Command::new(common::bin())
            .args(["score", &s(m), &s(&train), "-o", &s(&out)])
            .status()
            .unwrap()
            .success());
        std::fs::read(out).unwrap()
    };
    assert!(scores(&reference, "a.csv") == scores(&model, "b.csv"), "the resumed search chose or trained differently");
    let log = |m: &std::path::Path| without_seconds(std::fs::read_to_string(m.with_extension("jsonl")).unwrap());
    assert!(log(&reference) == log(&model), "the resumed search logged other epochs or candidates");
}

/// The log of a search: every flow's epochs marked with its configuration,
/// then one result line per candidate, the same as the model's metadata,
/// each saying why it stopped, exactly one chosen.
fn check_search_log(model: &std::path::Path) {
    let log = tidemark::train::read_log(&model.with_extension("jsonl")).unwrap();
    let kept = tidemark::model::Model::load(model).unwrap().meta.training.candidates;
    assert_eq!(log.candidates.len(), kept.len());
    assert!(log.candidates.iter().zip(&kept).all(|(a, b)| a.name == b.name && a.validation_nll == b.validation_nll));
    assert_eq!(log.candidates.iter().filter(|c| c.chosen).count(), 1, "{:?}", log.candidates);
    assert!(log.candidates.iter().all(|c| !c.stopped.is_empty()), "{:?}", log.candidates);
    for c in log.candidates.iter().filter(|c| c.kind == Kind::Flow) {
        let epochs = log.epochs.iter().filter(|e| e.candidate.as_deref() == Some(c.name.as_str())).count();
        assert_eq!(epochs, c.epochs, "{}", c.name);
        assert!(!c.stages.is_empty() && c.stages.len() <= 3, "{c:?}");
    }
    assert!(log.epochs.iter().all(|e| e.candidate.is_some()));
}

/// A JSON-lines log with every "seconds" field removed (wall time differs
/// between runs; everything else must not).
fn without_seconds(text: String) -> Vec<serde_json::Value> {
    fn strip(v: &mut serde_json::Value) {
        if let Some(o) = v.as_object_mut() {
            o.remove("seconds");
            o.values_mut().for_each(strip);
        }
    }
    text.lines()
        .map(|l| {
            let mut v: serde_json::Value = serde_json::from_str(l).unwrap();
            strip(&mut v);
            v
        })
        .collect()
}
