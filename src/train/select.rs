//! The default `fit`: every density kind that suits the data is fitted on
//! the same training rows and the one with the best validation
//! log-likelihood is kept. A fixed table of settings tuned on one dump does
//! not transfer to the next; the held-out rows can decide.

use super::checkpoint::{absolute, same_inputs, SEARCH_KEY};
use super::{
    fit_one, write_log, FitOptions, LogEntry, Pause, Run, Settings, Staged, TrainState, GAUSSIAN_BELOW_ROWS_PER_FEATURE,
};
use crate::error::{Error, Result};
use crate::model::{kind_name, Candidate, Extras, Kind, Model};
use crate::output::note;
use std::path::Path;
use std::time::{Duration, Instant};

/// Whether `fit` chooses the density: no kind or flow option given, not
/// resuming one run, not told to skip the search, and validation rows to
/// choose on.
pub(super) fn applies(run: &Run, opts: &FitOptions) -> bool {
    opts.kind.is_none()
        && !opts.no_search
        && !opts.asks_for_a_flow()
        && run.resume.is_none()
        && (run.val.is_some() || opts.val_fraction.unwrap_or(super::DEFAULT_VAL_FRACTION) > 0.0)
}

/// The kinds compared: the (class-)Gaussian, the (class-)mixture, and the
/// flow unless training rows are too few per feature for one
/// (measured: see [`GAUSSIAN_BELOW_ROWS_PER_FEATURE`]).
fn kinds(run: &Run, opts: &FitOptions) -> Vec<Kind> {
    let labelled = run.labels.is_some();
    let mut kinds = vec![if labelled { Kind::ClassGaussian } else { Kind::Gaussian }, Kind::Mixture];
    let val_share = if run.val.is_some() { 0.0 } else { opts.val_fraction.unwrap_or(super::DEFAULT_VAL_FRACTION) };
    let train_rows = run.data.rows as f64 * (1.0 - val_share);
    if train_rows >= GAUSSIAN_BELOW_ROWS_PER_FEATURE * run.data.cols as f64 {
        kinds.push(Kind::Flow);
    } else if !opts.quiet {
        note(format!(
            "{:.0} training rows for {} features ({:.1} per feature): too few for a flow, comparing the other kinds; \
             --kind flow fits one anyway",
            train_rows,
            run.data.cols,
            train_rows / run.data.cols as f64
        ));
    }
    kinds
}

/// What distinguishes a fitted candidate, for the leaderboard.
fn detail(m: &Model) -> String {
    let t = &m.meta.training;
    match (m.meta.kind, &m.meta.mixture) {
        (Kind::Mixture, Some(mm)) if !mm.per_class.is_empty() => {
            let per: Vec<String> = mm.per_class.iter().map(|k| k.to_string()).collect();
            format!("{} components ({} per class), ridge {:.3e}", mm.components, per.join(", "), mm.ridge)
        }
        (Kind::Mixture, Some(mm)) => format!("{} components, ridge {:.3e}", mm.components, mm.ridge),
        (Kind::Flow, _) => format!(
            "{}, best epoch {}",
            flow_shape(m.meta.flow.layers, m.meta.flow.coupling, m.meta.flow_dims, m.dim(), m.meta.flow.hidden),
            t.best_epoch
        ),
        _ => format!("covariance shrinkage {:.3e}", m.pre.shrinkage),
    }
}

fn flow_shape(layers: usize, coupling: crate::flow::Coupling, flow_dims: usize, dims: usize, hidden: usize) -> String {
    let coupling = match coupling {
        crate::flow::Coupling::Affine => "affine",
        crate::flow::Coupling::Spline { .. } => "spline",
    };
    format!("{layers} {coupling} coupling layers over {flow_dims} of {dims} dims, hidden {hidden}")
}

/// Whether `new` (a more flexible kind) beats `old` on the validation rows
/// by more than one standard error of the paired per-row difference in
/// NLL: within noise the simpler density is kept (the one-standard-error
/// rule; Breiman et al. 1984, "Classification and Regression Trees").
/// Both models keep the NLLs of the same validation rows, in the same order.
fn clearly_better(new: &Model, old: &Model) -> bool {
    let (a, b) = (&new.refs.validation_nll, &old.refs.validation_nll);
    let mean_new = new.meta.training.best_validation_nll;
    let mean_old = old.meta.training.best_validation_nll;
    if a.len() != b.len() || a.len() < 2 {
        return mean_new < mean_old;
    }
    let n = a.len() as f64;
    let diff: Vec<f64> = b.iter().zip(a).map(|(o, w)| o - w).collect();
    let mean = diff.iter().sum::<f64>() / n;
    let sd = (diff.iter().map(|d| (d - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    mean > sd / n.sqrt()
}

/// One flow configuration of the search: a name and the options that set it.
struct FlowConfig {
    name: &'static str,
    opts: FitOptions,
}

/// The flows compared, around the settings table for this data size
/// (`table`): every modelled-dimension choice, lighter and heavier
/// regularisation, a wider and a deeper conditioner, LU mixing, all three
/// of a wider and deeper conditioner with LU mixing, and spline couplings.
/// Configurations that come out the same are tried once.
fn flow_configs(opts: &FitOptions, table: &Settings, dims: usize) -> Vec<FlowConfig> {
    let base = FitOptions { kind: Some(Kind::Flow), quiet: true, ..opts.clone() };
    let set = |f: &dyn Fn(&mut FitOptions)| {
        let mut o = FitOptions {
            flow_dims: Some(dims),
            layers: Some(table.layers),
            hidden: Some(table.hidden),
            dropout: Some(table.dropout),
            noise: Some(table.noise),
            ..base.clone()
        };
        f(&mut o);
        o
    };
    let wide = (2 * table.hidden).min(1024);
    let wider = (4 * table.hidden).min(512).max(wide);
    let mut configs = vec![
        FlowConfig { name: "settings table", opts: set(&|o| o.flow_dims = Some(table.flow_dims)) },
        FlowConfig { name: "all dims", opts: set(&|_| ()) },
        FlowConfig {
            name: "two thirds of the dims",
            opts: set(&|o| o.flow_dims = Some((2 * dims).div_ceil(3).max(2.min(dims)))),
        },
        FlowConfig {
            name: "wide, light regularisation",
            opts: set(&|o| {
                o.hidden = Some(wide);
                o.dropout = Some(0.05);
                o.noise = Some(0.05);
            }),
        },
        FlowConfig { name: "no dropout or noise", opts: set(&|o| (o.dropout, o.noise) = (Some(0.0), Some(0.0))) },
        FlowConfig {
            name: "heavier regularisation",
            opts: set(&|o| {
                o.dropout = Some((table.dropout + 0.1).min(0.5));
                o.noise = Some(table.noise + 0.1);
                o.weight_decay = Some(1e-4);
            }),
        },
        FlowConfig { name: "deeper (10 layers)", opts: set(&|o| o.layers = Some(10)) },
        FlowConfig { name: "LU mixing", opts: set(&|o| o.mixing = Some(crate::flow::Mixing::Lu)) },
        FlowConfig {
            name: "wider and deeper, LU mixing",
            opts: set(&|o| {
                o.hidden = Some(wider);
                o.layers = Some(10);
                o.mixing = Some(crate::flow::Mixing::Lu);
            }),
        },
        FlowConfig { name: "spline couplings", opts: set(&|o| o.coupling = Some(super::CouplingKind::Spline)) },
    ];
    let key = |o: &FitOptions| {
        format!("{:?}", (o.flow_dims, o.layers, o.hidden, o.dropout, o.noise, o.weight_decay, o.mixing, o.coupling))
    };
    let mut seen = std::collections::HashSet::new();
    configs.retain(|c| c.opts.flow_dims.is_none_or(|k| k <= dims) && seen.insert(key(&c.opts)));
    configs
}

/// The default search budget: this many times the projected time of the
/// whole race when no run stops early, at least a minute. The projection
/// takes the settings table's flow's seconds per epoch from its first stage
/// and scales it by every flow's relative cost per epoch
/// ([`relative_cost`]) and by the epochs successive halving gives each
/// round; the slack covers validation passes and a loaded machine.
const BUDGET_SLACK: f64 = 1.5;

/// Time per update of a spline coupling against an affine one with the
/// same conditioner: 8-13x (D = 384 and 64; DEVELOPERS.md).
const SPLINE_COST: f64 = 10.0;

/// A flow's time per epoch relative to others: its parameter count, times
/// [`SPLINE_COST`] for spline couplings.
fn relative_cost(r: &Racer) -> f64 {
    let spline = r.flow.settings().coupling != crate::flow::Coupling::Affine;
    r.flow.parameters() as f64 * if spline { SPLINE_COST } else { 1.0 }
}

/// The default budget once the table's flow (`table`) has run its first
/// stage: its seconds per epoch times the race's projected epochs, each
/// weighted by its flow's relative cost, the better half of the flows
/// assumed to cost as much as all of them on average.
fn default_budget(table: &Racer, racers: &[Racer], stages: &[usize; ROUNDS]) -> f64 {
    let per_epoch = table.flow.seconds() / table.flow.epochs().max(1) as f64;
    let mean_cost = racers.iter().map(relative_cost).sum::<f64>() / racers.len() as f64 / relative_cost(table);
    (BUDGET_SLACK * per_epoch * mean_cost * race_epochs(racers.len(), stages) as f64).max(60.0)
}

/// Epochs that successive halving trains over all `n` flows when none stops
/// early: every flow to the first stage, the better half on to the second, ...
fn race_epochs(n: usize, stages: &[usize; ROUNDS]) -> usize {
    let (mut alive, mut before, mut epochs) = (n, 0, 0);
    for &until in stages {
        epochs += alive * (until - before);
        (alive, before) = (alive.div_ceil(2), until);
    }
    epochs
}

/// A flow of the search and how far it got.
struct Racer {
    config: FlowConfig,
    flow: Staged,
    stages: Vec<f64>,
    /// Why it left the race, once it has.
    stopped: Option<String>,
}

/// Where the race stands: the stage, the flows still racing, and which of
/// them trains next.
#[derive(Clone, serde::Serialize, serde::Deserialize)]
struct Position {
    round: usize,
    alive: Vec<usize>,
    /// Index into `alive` of the flow that trains next.
    next: usize,
    budget: Option<f64>,
    /// Seconds the search had run.
    elapsed: f64,
}

/// Everything but tensors that a search checkpoint holds.
#[derive(serde::Serialize, serde::Deserialize)]
struct SearchState {
    position: Position,
    racers: Vec<RacerState>,
    model_path: Option<std::path::PathBuf>,
    log_path: Option<std::path::PathBuf>,
}

#[derive(serde::Serialize, serde::Deserialize)]
struct RacerState {
    name: String,
    state: TrainState,
    stages: Vec<f64>,
    #[serde(default)]
    stopped: Option<String>,
}

/// A search checkpoint read back: its state, and the file for its tensors.
pub(crate) struct SavedSearch {
    state: SearchState,
    extras: Extras,
}

impl SavedSearch {
    pub(super) fn read(path: &Path, json: &str, extras: Extras) -> Result<SavedSearch> {
        let state: SearchState = serde_json::from_str(json).map_err(|e| {
            Error::model(path, format!("bad search checkpoint: {}", crate::data::printable(&e.to_string(), 200)))
        })?;
        let p = &state.position;
        if p.round >= ROUNDS || p.next > p.alive.len() || p.alive.iter().any(|&i| i >= state.racers.len()) {
            return Err(Error::model(path, "bad search checkpoint: its position is out of range"));
        }
        Ok(SavedSearch { state, extras })
    }

    pub(super) fn paths(&self) -> (Option<&Path>, Option<&Path>) {
        (self.state.model_path.as_deref(), self.state.log_path.as_deref())
    }
}

const ROUNDS: usize = 3;
const TENSORS: [&str; 4] = ["params", "best_params", "adam_m", "adam_v"];

/// The race: configurations, their flows (restored from a checkpoint when
/// resuming) and where it stands.
fn line_up(
    run: &Run,
    opts: &FitOptions,
    table: &Settings,
    dims: usize,
    saved: Option<&SavedSearch>,
) -> Result<(Vec<Racer>, Position)> {
    let mut racers: Vec<Racer> = Vec::new();
    for config in flow_configs(opts, table, dims) {
        let flow = Staged::new(run, &config.opts)?;
        racers.push(Racer { config, flow, stages: Vec::new(), stopped: None });
    }
    let Some(saved) = saved else {
        let position = Position {
            round: 0,
            alive: (0..racers.len()).collect(),
            next: 0,
            budget: opts.budget.map(|b| b.0),
            elapsed: 0.0,
        };
        return Ok((racers, position));
    };
    let names: Vec<&str> = racers.iter().map(|r| r.config.name).collect();
    let kept: Vec<&str> = saved.state.racers.iter().map(|r| r.name.as_str()).collect();
    if names != kept {
        return Err(Error::Invalid(format!(
            "{}: this search raced other flows ({}); start a new run",
            saved.extras.path().display(),
            kept.join(", ")
        )));
    }
    for (i, (r, s)) in racers.iter_mut().zip(&saved.state.racers).enumerate() {
        same_inputs(run, &s.state)?;
        let n = r.flow.tensors()[0].len();
        let t = |name: &str| saved.extras.tensor(&format!("search.{i}.{name}"), n);
        r.flow.restore(s.state.clone(), [t(TENSORS[0])?, t(TENSORS[1])?, t(TENSORS[2])?, t(TENSORS[3])?]);
        r.stages = s.stages.clone();
        r.stopped = s.stopped.clone();
    }
    let mut position = saved.state.position.clone();
    if let Some(b) = opts.budget {
        position.budget = Some(b.0);
    }
    Ok((racers, position))
}

/// Write the search checkpoint: the best density so far as the model, each
/// flow's weights, best weights and optimizer moments, and the position.
fn save_search(run: &Run, best: &Model, racers: &[Racer], position: Position) -> Result<()> {
    let Some(path) = &run.checkpoint else { return Ok(()) };
    let state = SearchState {
        position,
        racers: racers
            .iter()
            .map(|r| RacerState {
                name: r.config.name.to_string(),
                state: r.flow.state().clone(),
                stages: r.stages.clone(),
                stopped: r.stopped.clone(),
            })
            .collect(),
        model_path: absolute(run.output),
        log_path: absolute(run.log),
    };
    let json = serde_json::to_string(&state).map_err(|e| Error::Invalid(e.to_string()))?;
    let mut extra = Vec::new();
    for (i, r) in racers.iter().enumerate() {
        for (name, values) in TENSORS.iter().zip(r.flow.tensors()) {
            extra.push((format!("search.{i}.{name}"), values));
        }
    }
    best.save_with(path, extra, Some((SEARCH_KEY, json)))
}

/// Successive halving over the flow configurations (Jamieson & Talwalkar
/// 2016; Li et al. 2018): every configuration trains for a quarter of the
/// epochs, the better half by validation NLL carries on to half, the better
/// half of those to all of them (each on the learning-rate schedule of the
/// full run, so a stage continues where the last one paused). A run that
/// stops early keeps its best. The stages stop when the budget is spent.
/// A search checkpoint (see [`save_search`]) is written after every stage
/// of every flow and when interrupted; [`resume`] continues it to the same
/// result.
fn race_flows(run: &Run, opts: &FitOptions, best: &Model, saved: Option<&SavedSearch>) -> Result<(Vec<Racer>, usize)> {
    let quiet_run = Run { output: None, checkpoint: None, log: None, ..*run };
    // The settings table and the dimensions come from a flow's own
    // whitening (the Gaussian's shrinkage may keep a direction it drops).
    let probe = Staged::new(&quiet_run, &FitOptions { kind: Some(Kind::Flow), quiet: true, ..opts.clone() })?;
    let (table, dims) = (probe.settings().clone(), probe.dim());
    drop(probe);
    let epochs = table.epochs;
    let stages = [epochs.div_ceil(4), epochs.div_ceil(2), epochs];
    let (mut racers, mut at) = line_up(&quiet_run, opts, &table, dims, saved)?;
    let started = Instant::now().checked_sub(Duration::from_secs_f64(at.elapsed)).unwrap_or_else(Instant::now);
    while at.round < ROUNDS {
        let until = stages[at.round];
        while at.next < at.alive.len() {
            let i = at.alive[at.next];
            let first = at.round == 0 && i == 0;
            if at.budget.is_some_and(|b| started.elapsed().as_secs_f64() >= b) && !first {
                break;
            }
            let deadline = at.budget.filter(|_| !first).map(|b| started + Duration::from_secs_f64(b));
            let r = &mut racers[i];
            if let Err(e) = r.flow.train_to(&quiet_run, &r.config.opts, Pause { epoch: until, deadline }) {
                if let Error::Interrupted(_) = e {
                    at.elapsed = started.elapsed().as_secs_f64();
                    save_search(run, best, &racers, at)?;
                }
                return Err(e);
            }
            r.stages.push(r.flow.best_validation_nll());
            let r = &racers[i];
            if at.budget.is_none() {
                // The first stage of the table's flow sets the default budget.
                let b = default_budget(r, &racers, &stages);
                at.budget = Some(b);
                if !opts.quiet {
                    note(format!(
                        "search budget {} ({BUDGET_SLACK} x the race's projected time; --budget sets it)",
                        minutes(b)
                    ));
                }
            }
            if !opts.quiet {
                note(format!(
                    "flow \"{}\": epoch {}, validation NLL {:.4} nats/vector ({} spent)",
                    r.config.name,
                    r.flow.epochs(),
                    r.flow.best_validation_nll(),
                    minutes(started.elapsed().as_secs_f64())
                ));
            }
            at.next += 1;
            write_log(run, &race_log(&racers), &[])?;
            // After every stage of every flow, so that a run killed outright
            // (SIGKILL, power loss) loses at most one stage of one flow.
            at.elapsed = started.elapsed().as_secs_f64();
            save_search(run, best, &racers, at.clone())?;
        }
        halve(&mut racers, &mut at);
    }
    for r in &mut racers {
        let why = match r.flow.finished() {
            true => r.flow.why_finished(),
            false => format!("budget spent at epoch {}", r.flow.epochs()),
        };
        r.stopped.get_or_insert(why);
    }
    Ok((racers, dims))
}

/// End a stage: the better half carries on; a finished run stands on its
/// best, and one the budget left waiting stops where it is.
fn halve(racers: &mut [Racer], at: &mut Position) {
    let round = at.round;
    let stage = format!("stage {} of {ROUNDS}", round + 1);
    for &i in &at.alive {
        let r = &mut racers[i];
        if r.stages.len() != round + 1 {
            r.stopped = Some(format!("budget spent before {stage}"));
        } else if r.flow.finished() {
            r.stopped = Some(r.flow.why_finished());
        }
    }
    at.alive.retain(|&i| racers[i].stopped.is_none());
    at.alive.sort_by(|&a, &b| racers[a].flow.best_validation_nll().total_cmp(&racers[b].flow.best_validation_nll()));
    let (n, keep) = (at.alive.len(), at.alive.len().div_ceil(2));
    if round + 1 < ROUNDS {
        for (rank, &i) in at.alive.iter().enumerate().skip(keep) {
            racers[i].stopped = Some(format!("halved out after {stage} (ranked {} of {n})", rank + 1));
        }
    }
    at.alive.truncate(keep);
    at.round += 1;
    at.next = 0;
}

/// Every flow's epochs so far, each marked with its configuration.
fn race_log(racers: &[Racer]) -> Vec<LogEntry> {
    racers.iter().flat_map(|r| r.flow.log_as(r.config.name)).collect()
}

fn minutes(seconds: f64) -> String {
    if seconds < 120.0 {
        format!("{seconds:.0} s")
    } else {
        format!("{:.1} min", seconds / 60.0)
    }
}

/// Fit every candidate kind and keep the best on the validation rows: the
/// Gaussian, the mixture, and flows raced by successive halving. An
/// interrupted search writes the best density so far to the run's output.
pub(super) fn fit_best(run: &Run, opts: &FitOptions, saved: Option<&SavedSearch>) -> Result<Model> {
    let mut best: Option<Model> = None;
    let mut candidates: Vec<Candidate> = Vec::new();
    let mut flow_epochs: Vec<LogEntry> = Vec::new();
    let quiet_run = Run { output: None, checkpoint: None, log: None, resume: None, ..*run };
    for kind in kinds(run, opts) {
        let t = Instant::now();
        if kind != Kind::Flow {
            let model = match fit_one(&quiet_run, &FitOptions { kind: Some(kind), quiet: true, ..opts.clone() }) {
                Ok(model) => model,
                // A later kind that does not suit the data is left out; the Gaussian always fits.
                Err(Error::Invalid(why)) if best.is_some() => {
                    if !opts.quiet {
                        note(format!("{} left out of the comparison: {why}", kind_name(kind)));
                    }
                    continue;
                }
                Err(e) => return Err(e),
            };
            let c = Candidate {
                name: kind_name(kind),
                detail: detail(&model),
                seconds: t.elapsed().as_secs_f64(),
                stopped: closed_form_or_em(&model),
                ..candidate(&model)
            };
            keep(opts, &mut candidates, &mut best, model, c);
            continue;
        }
        let first = best.as_ref().expect("a Gaussian kind comes first");
        let (racers, dims) = match race_flows(run, opts, first, saved) {
            Ok(r) => r,
            Err(Error::Interrupted(msg)) => return Err(interrupted(run, best, msg)),
            Err(e) => return Err(e),
        };
        let seconds_all: f64 = racers.iter().map(|r| r.flow.seconds()).sum();
        flow_epochs = race_log(&racers);
        let winner = (0..racers.len())
            .min_by(|&a, &b| racers[a].flow.best_validation_nll().total_cmp(&racers[b].flow.best_validation_nll()));
        for (i, r) in racers.into_iter().enumerate() {
            let raced = Candidate {
                name: r.config.name.to_string(),
                seconds: r.flow.seconds(),
                epochs: r.flow.epochs(),
                stopped: r.stopped.unwrap_or_default(),
                stages: r.stages,
                ..candidate_of_kind(kind)
            };
            if Some(i) == winner {
                let model = r.flow.into_model(&quiet_run)?;
                let c = Candidate {
                    detail: format!("\"{}\": {}", raced.name, detail(&model)),
                    validation_nll: model.meta.training.best_validation_nll,
                    ..raced
                };
                keep(opts, &mut candidates, &mut best, model, c);
            } else {
                let s = r.flow.settings();
                candidates.push(Candidate {
                    detail: format!(
                        "\"{}\": {}",
                        raced.name,
                        flow_shape(s.layers, s.coupling, s.flow_dims, dims, s.hidden)
                    ),
                    validation_nll: r.flow.best_validation_nll(),
                    ..raced
                });
            }
        }
        if !opts.quiet {
            note(format!("flows raced for {}", minutes(seconds_all)));
        }
    }
    let mut model = best.ok_or_else(|| Error::Invalid("no density could be fitted".into()))?;
    let chosen = model.meta.training.best_validation_nll;
    for c in &mut candidates {
        c.chosen = c.kind == model.meta.kind && c.validation_nll == chosen;
    }
    write_log(run, &flow_epochs, &candidates)?;
    model.meta.training.candidates = candidates;
    Ok(model)
}

/// A candidate of `kind` with nothing measured yet.
fn candidate_of_kind(kind: Kind) -> Candidate {
    Candidate {
        kind,
        name: String::new(),
        detail: String::new(),
        validation_nll: f64::INFINITY,
        seconds: 0.0,
        chosen: false,
        epochs: 0,
        stopped: String::new(),
        stages: Vec::new(),
    }
}

/// A fitted model as a candidate: its kind and validation NLL.
fn candidate(model: &Model) -> Candidate {
    Candidate { validation_nll: model.meta.training.best_validation_nll, ..candidate_of_kind(model.meta.kind) }
}

/// How a candidate fitted without epochs ended.
fn closed_form_or_em(model: &Model) -> String {
    match &model.meta.mixture {
        Some(m) if m.converged => format!("EM converged ({} iterations)", m.em_iterations),
        Some(m) => format!("EM stopped at {} iterations, not converged", m.em_iterations),
        None => "closed form".to_string(),
    }
}

/// List a fitted candidate, and keep it when it is clearly better than the
/// best so far.
fn keep(opts: &FitOptions, candidates: &mut Vec<Candidate>, best: &mut Option<Model>, model: Model, c: Candidate) {
    if !opts.quiet {
        note(format!(
            "candidate {}: validation NLL {:.4} nats/vector ({:.1} s; {})",
            kind_name(c.kind),
            c.validation_nll,
            c.seconds,
            c.detail
        ));
    }
    candidates.push(c);
    // The Gaussian's shrinkage can keep directions along which the training
    // rows do not vary, which the unshrunk whitening of the mixture and the
    // flows leaves out; densities over different dimensions do not compare,
    // so the Gaussian then stands aside (the one-component mixture and each
    // flow's untrained start take its place).
    if let Some(b) = best.as_ref().filter(|b| b.dim() != model.dim()) {
        let why = format!(
            "not compared: its shrinkage keeps {} directions that have no training variance",
            b.dim().abs_diff(model.dim())
        );
        if !opts.quiet {
            note(format!("candidate {} {why}", kind_name(b.meta.kind)));
        }
        if let Some(first) = candidates.first_mut() {
            first.detail = format!("{}; {why}", first.detail);
        }
        *best = Some(model);
    } else if best.as_ref().is_none_or(|b| clearly_better(&model, b)) {
        *best = Some(model);
    }
}

/// Continue an interrupted search from its checkpoint: the Gaussian kinds
/// are fitted again (they are quick and deterministic), the flows go on
/// from where they stopped.
pub(super) fn resume(run: &Run, opts: &FitOptions, saved: &SavedSearch) -> Result<Model> {
    if opts.kind.is_some() || opts.asks_for_a_flow() {
        return Err(Error::Invalid(
            "this checkpoint is of a search over densities; resume it with the options it was started with".into(),
        ));
    }
    fit_best(run, opts, Some(saved))
}

/// The error of an interrupted search, after writing the best density so
/// far where the run's model goes.
fn interrupted(run: &Run, best: Option<Model>, msg: String) -> Error {
    match (best, run.output) {
        (Some(model), Some(out)) => match model.save(out) {
            Ok(()) => Error::Interrupted(format!(
                "search interrupted ({msg}); the best density so far ({}) written to {}",
                kind_name(model.meta.kind),
                out.display()
            )),
            Err(e) => e,
        },
        _ => Error::Interrupted(format!("search interrupted ({msg})")),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Nine flows to 50 epochs, five on to 100, three on to 200.
    #[test]
    fn race_epochs_follow_the_halving() {
        assert_eq!(race_epochs(9, &[50, 100, 200]), 9 * 50 + 5 * 50 + 3 * 100);
        assert_eq!(race_epochs(1, &[50, 100, 200]), 200);
    }

    #[test]
    fn spline_couplings_race_when_the_table_already_models_every_dim() {
        // With 125 rows per feature the table models all 32 dims, so the
        // "all dims" configuration repeats it and is dropped; the spline
        // one differs only in its couplings and must stay.
        let opts = FitOptions::default();
        let table = Settings::resolve(&opts, 4000, 32, true, false).expect("valid settings");
        assert_eq!(table.flow_dims, 32);
        let names: Vec<&str> = flow_configs(&opts, &table, 32).iter().map(|c| c.name).collect();
        assert!(names.contains(&"spline couplings"), "{names:?}");
        assert!(!names.contains(&"all dims"), "{names:?}");
    }
}
