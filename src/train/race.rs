//! The flows of the search, raced by successive halving on the validation
//! rows: a first round over configurations spread around the settings
//! table, then a local round around its winner on a longer schedule (and,
//! under a budget the user gives, further local rounds while they find a
//! better flow and time is left). The whole race can be checkpointed and
//! resumed.

use super::checkpoint::{absolute, same_inputs, SEARCH_KEY};
use super::optimizer::lu_rate;
use super::{write_log, FitOptions, LogEntry, Pause, Run, Settings, Staged, TrainState};
use crate::error::{Error, Result};
use crate::flow::Mixing;
use crate::model::{Extras, Kind, Model};
use crate::output::note;
use std::path::Path;
use std::time::{Duration, Instant};

/// One flow configuration of the search: a name and the options that set it.
pub(super) struct FlowConfig {
    pub(super) name: String,
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
    let configs = vec![
        ("settings table", set(&|o| o.flow_dims = Some(table.flow_dims))),
        ("all dims", set(&|_| ())),
        ("two thirds of the dims", set(&|o| o.flow_dims = Some((2 * dims).div_ceil(3).max(2.min(dims))))),
        (
            "wide, light regularisation",
            set(&|o| {
                o.hidden = Some(wide);
                o.dropout = Some(0.05);
                o.noise = Some(0.05);
            }),
        ),
        ("no dropout or noise", set(&|o| (o.dropout, o.noise) = (Some(0.0), Some(0.0)))),
        (
            "heavier regularisation",
            set(&|o| {
                o.dropout = Some((table.dropout + REGULARISATION_STEP).min(MAX_DROPOUT));
                o.noise = Some(table.noise + REGULARISATION_STEP);
                o.weight_decay = Some(REGULARISED_DECAY);
            }),
        ),
        ("deeper (10 layers)", set(&|o| o.layers = Some(10))),
        ("LU mixing", set(&|o| o.mixing = Some(Mixing::Lu))),
        (
            "wider and deeper, LU mixing",
            set(&|o| {
                o.hidden = Some(wider);
                o.layers = Some(10);
                o.mixing = Some(Mixing::Lu);
            }),
        ),
        ("spline couplings", set(&|o| o.coupling = Some(super::CouplingKind::Spline))),
    ];
    distinct(configs.into_iter().filter(|(_, o)| o.flow_dims.is_none_or(|k| k <= dims)))
}

/// Named configurations, each tried once: a later one that comes out the
/// same as an earlier one is dropped.
fn distinct(configs: impl Iterator<Item = (impl Into<String>, FitOptions)>) -> Vec<FlowConfig> {
    let key = |o: &FitOptions| {
        format!(
            "{:?}",
            (
                o.flow_dims,
                o.layers,
                o.hidden,
                o.dropout,
                o.noise,
                o.weight_decay,
                o.mixing,
                o.lu_rate,
                o.coupling,
                o.epochs
            )
        )
    };
    let mut seen = std::collections::HashSet::new();
    configs.filter(|(_, o)| seen.insert(key(o))).map(|(name, opts)| FlowConfig { name: name.into(), opts }).collect()
}

/// One step of dropout and of input noise (whitened units) between
/// neighbouring configurations.
const REGULARISATION_STEP: f64 = 0.1;
/// The weight decay of the more regularised configurations (the table
/// has none).
const REGULARISED_DECAY: f64 = 1e-4;
const MAX_DROPOUT: f64 = 0.5;

/// The local round trains this many times the table's epochs: a flow that
/// still improved at the first round's last epoch gains from a longer
/// cosine schedule.
const LOCAL_SCHEDULE: usize = 2;

/// The first local round waits this many times the table's patience
/// before stopping early: twice, as the learning rate falls as much in
/// twice the epochs, and half as much again because its flows are the
/// candidates for the final model, whose validation NLL still falls in
/// steps late in the cosine schedule. Measured on fashion (D = 320): its
/// winner stopped at epoch 269 with a patience of 20; with 25 it ran to
/// epoch 325 and its held-out log-likelihood rose by 2 nats. Each further
/// round waits [`LOCAL_SCHEDULE`] times its winner's patience, as long
/// relative to its schedule.
const LOCAL_PATIENCE: usize = 3;

/// The early-stopping patience of a local round around a flow trained
/// with `patience`, in the first round (`first`) or a local one.
fn local_patience(patience: usize, first: bool) -> usize {
    if first {
        LOCAL_PATIENCE * patience
    } else {
        LOCAL_SCHEDULE * patience
    }
}

/// What mixes features, as the local round varies it: the permutation, LU
/// blocks at the rule's rate ([`lu_rate`] of the flow's dims, `None`) and,
/// where that rule slows them (above 76 dims), LU blocks at the full rate.
/// The rule was measured on one set (tokens, D = 384), where the default
/// fit gained 8 nats; on another (sentences, same D) the full rate was 1.4
/// nats better, so the validation rows choose.
type MixingChoice = (Mixing, Option<f64>);

fn mixing_choices(flow_dims: usize) -> Vec<MixingChoice> {
    let mut choices = vec![(Mixing::Permutation, None), (Mixing::Lu, None)];
    if lu_rate(flow_dims) < 1.0 {
        choices.push((Mixing::Lu, Some(1.0)));
    }
    choices
}

fn mixing_name(choice: MixingChoice) -> &'static str {
    match choice {
        (Mixing::Permutation, _) => "permutation mixing",
        (Mixing::Lu, None) => "LU mixing",
        (Mixing::Lu, Some(_)) => "LU mixing at the full rate",
    }
}

/// The local round's configurations: the winner of the first round (its
/// `settings` as resolved, its `opts` as given) with one regularisation
/// step either way (dropout and input noise, weight decay at least
/// [`REGULARISED_DECAY`] on the way up) crossed with every mixing choice
/// ([`mixing_choices`]), all on the longer schedule and with `patience`,
/// the winner's own settings included. The first round samples each setting
/// coarsely around the table; this round searches the winner's
/// neighbourhood, as one tuning by hand would next.
fn local_configs(winner: &FlowConfig, settings: &Settings, patience: usize) -> Vec<FlowConfig> {
    let epochs = LOCAL_SCHEDULE * settings.epochs;
    let own = (settings.mixing, winner.opts.lu_rate);
    let mut mixings = vec![own];
    mixings.extend(mixing_choices(settings.flow_dims).into_iter().filter(|&c| c != own));
    let step = |up: f64| {
        let dropout = (settings.dropout + up).clamp(0.0, MAX_DROPOUT);
        let noise = (settings.noise + up).max(0.0);
        let decay = if up > 0.0 { settings.weight_decay.max(REGULARISED_DECAY) } else { settings.weight_decay };
        (dropout, noise, decay)
    };
    let mut configs = Vec::new();
    for (up, change) in [(0.0, None), (REGULARISATION_STEP, Some("more")), (-REGULARISATION_STEP, Some("less"))] {
        for &(mixing, lu_rate) in &mixings {
            let (dropout, noise, decay) = step(up);
            let opts = FitOptions {
                dropout: Some(dropout),
                noise: Some(noise),
                weight_decay: Some(decay),
                mixing: Some(mixing),
                lu_rate,
                epochs: Some(epochs),
                patience: Some(patience),
                ..winner.opts.clone()
            };
            let mut what: Vec<String> = change.map(|c| format!("{c} regularisation")).into_iter().collect();
            if (mixing, lu_rate) != own {
                what.push(mixing_name((mixing, lu_rate)).to_string());
            }
            what.push(format!("{epochs} epochs"));
            configs.push((format!("{} / {}", winner.name, what.join(", ")), opts));
        }
    }
    distinct(configs.into_iter())
}

/// The next local round's configurations, around the best flow so far.
fn around_winner(racers: &[Racer]) -> Vec<FlowConfig> {
    let w = &racers[winner(racers)];
    let settings = w.flow.settings();
    local_configs(&w.config, settings, local_patience(settings.patience, w.first_stage == 0))
}

/// Most configurations of a local round around a flow over `flow_dims`:
/// three regularisation levels times the mixing choices.
fn local_most(flow_dims: usize) -> usize {
    3 * mixing_choices(flow_dims).len()
}

/// Most local rounds, each on twice the last one's schedule.
const MOST_LOCAL_ROUNDS: usize = 3;

/// Whether another local round follows the `done` rounds (the first
/// included) so far. The first local round runs whenever budget is `left`.
/// A further one needs a budget the user gave (the default budget projects
/// one local round), at most [`MOST_LOCAL_ROUNDS`] in all, the best flow so
/// far found by the last round (round `winner_round`: a longer schedule
/// around it may gain again; otherwise the longer schedule stopped paying),
/// and twice the last round's seconds left (its flows train twice as long).
fn another_round(done: usize, winner_round: usize, last_seconds: f64, left: f64, given: bool) -> bool {
    match done {
        1 => left > 0.0,
        _ => {
            given
                && done <= MOST_LOCAL_ROUNDS
                && winner_round == done - 1
                && LOCAL_SCHEDULE as f64 * last_seconds <= left
        }
    }
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
/// stage: its seconds per epoch times the race's projected epochs, both
/// rounds, each weighted by the first round's mean relative cost per epoch
/// (the better half, and the local round's flows, assumed to cost as much
/// as all of them on average); the local round is taken as the most flows
/// it can hold around the widest flow.
fn default_budget(table: &Racer, racers: &[Racer], epochs: usize) -> f64 {
    let per_epoch = table.flow.seconds() / table.flow.epochs().max(1) as f64;
    let mean_cost = racers.iter().map(relative_cost).sum::<f64>() / racers.len() as f64 / relative_cost(table);
    let widest = racers.iter().map(|r| r.flow.settings().flow_dims).max().unwrap_or(0);
    let local = race_epochs(local_most(widest), &stages(ROUNDS, epochs));
    let projected = race_epochs(racers.len(), &stages(0, epochs)) + local;
    (BUDGET_SLACK * per_epoch * mean_cost * projected as f64).max(60.0)
}

/// Epochs that successive halving trains over all `n` flows when none stops
/// early: every flow to the first stage, the better half on to the second, ...
fn race_epochs(n: usize, stages: &[usize; ROUNDS]) -> usize {
    let mut before = 0;
    let mut epochs = 0;
    for (stage, &until) in stages.iter().enumerate() {
        epochs += places(n, stage) * (until - before);
        before = until;
    }
    epochs
}

/// Rounds of halving in each race (the first and the local one).
const ROUNDS: usize = 3;

/// The epochs each stage of the race that `round` belongs to trains to,
/// for a table of `epochs`: a quarter, half and all of the schedule, which
/// each local round makes [`LOCAL_SCHEDULE`] times as long as the last.
fn stages(round: usize, epochs: usize) -> [usize; ROUNDS] {
    let total = epochs * LOCAL_SCHEDULE.pow((round / ROUNDS) as u32);
    [total.div_ceil(4), total.div_ceil(2), total]
}

/// A flow of the search and how far it got.
pub(super) struct Racer {
    pub(super) config: FlowConfig,
    pub(super) flow: Staged,
    /// Best validation NLL after each stage it ran.
    pub(super) stages: Vec<f64>,
    /// The stage it started at: 0, or a multiple of [`ROUNDS`] for a local
    /// round.
    pub(super) first_stage: usize,
    /// Why it left the race, once it has.
    pub(super) stopped: Option<String>,
}

/// Where the race stands: the stage (each local round's stages follow the
/// last round's), the flows still racing, and which of them trains next.
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
        let rounds = ROUNDS * (1 + MOST_LOCAL_ROUNDS);
        if p.round >= rounds || p.next > p.alive.len() || p.alive.iter().any(|&i| i >= state.racers.len()) {
            return Err(Error::model(path, "bad search checkpoint: its position is out of range"));
        }
        Ok(SavedSearch { state, extras })
    }

    pub(super) fn paths(&self) -> (Option<&Path>, Option<&Path>) {
        (self.state.model_path.as_deref(), self.state.log_path.as_deref())
    }
}

const TENSORS: [&str; 4] = ["params", "best_params", "adam_m", "adam_v"];

/// Racers for `configs`, all starting at `first_stage`.
fn enter(run: &Run, configs: Vec<FlowConfig>, first_stage: usize) -> Result<Vec<Racer>> {
    configs
        .into_iter()
        .map(|config| {
            let flow = Staged::new(run, &config.opts)?;
            Ok(Racer { config, flow, stages: Vec::new(), first_stage, stopped: None })
        })
        .collect()
}

/// The race: configurations, their flows (restored from a checkpoint when
/// resuming) and where it stands.
fn line_up(
    run: &Run,
    opts: &FitOptions,
    table: &Settings,
    dims: usize,
    saved: Option<&SavedSearch>,
) -> Result<(Vec<Racer>, Position)> {
    let mut racers = enter(run, flow_configs(opts, table, dims), 0)?;
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
    restore(run, &mut racers, saved, 0)?;
    // Each local round's flows follow from the results of the rounds before.
    while saved.state.racers.len() > racers.len() {
        let first = racers.len();
        let round = racers[first - 1].first_stage / ROUNDS + 1;
        if round * ROUNDS > saved.state.position.round {
            return Err(Error::model(saved.extras.path(), "bad search checkpoint: more flows than its rounds raced"));
        }
        racers.extend(enter(run, around_winner(&racers), round * ROUNDS)?);
        restore(run, &mut racers, saved, first)?;
    }
    let mut position = saved.state.position.clone();
    if let Some(b) = opts.budget {
        position.budget = Some(b.0);
    }
    Ok((racers, position))
}

/// Restore the racers from `from` on to their checkpointed state, after
/// checking that the checkpoint raced the same flows.
fn restore(run: &Run, racers: &mut [Racer], saved: &SavedSearch, from: usize) -> Result<()> {
    let names: Vec<&str> = racers.iter().map(|r| r.config.name.as_str()).collect();
    let kept: Vec<&str> = saved.state.racers.iter().map(|r| r.name.as_str()).take(racers.len()).collect();
    if names != kept {
        let all: Vec<&str> = saved.state.racers.iter().map(|r| r.name.as_str()).collect();
        return Err(Error::Invalid(format!(
            "{}: this search raced other flows ({}); start a new run",
            saved.extras.path().display(),
            all.join(", ")
        )));
    }
    for (i, (r, s)) in racers.iter_mut().zip(&saved.state.racers).enumerate().skip(from) {
        same_inputs(run, &s.state)?;
        let n = r.flow.tensors()[0].len();
        let t = |name: &str| saved.extras.tensor(&format!("search.{i}.{name}"), n);
        r.flow.restore(s.state.clone(), [t(TENSORS[0])?, t(TENSORS[1])?, t(TENSORS[2])?, t(TENSORS[3])?]);
        r.stages = s.stages.clone();
        r.stopped = s.stopped.clone();
    }
    Ok(())
}

/// The flow with the best validation NLL (the first of equals).
pub(super) fn winner(racers: &[Racer]) -> usize {
    (0..racers.len())
        .min_by(|&a, &b| racers[a].flow.best_validation_nll().total_cmp(&racers[b].flow.best_validation_nll()))
        .unwrap_or(0)
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
                name: r.config.name.clone(),
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
/// stops early keeps its best. Then the same again over the winner's
/// neighbours ([`local_configs`]), as [`another_round`] allows. The stages
/// stop when the budget is spent; the search had run `before` seconds
/// (the other kinds) when the race began. A search checkpoint (see
/// [`save_search`]) is written after every stage of every flow and when
/// interrupted; resuming from it continues to the same result. Returns the
/// racers and the flows' dimensions.
pub(super) fn race_flows(
    run: &Run,
    opts: &FitOptions,
    best: &Model,
    saved: Option<&SavedSearch>,
    before: f64,
) -> Result<(Vec<Racer>, usize)> {
    let quiet_run = Run { output: None, checkpoint: None, log: None, ..*run };
    // The settings table and the dimensions come from a flow's own
    // whitening (the Gaussian's shrinkage may keep a direction it drops).
    let probe = Staged::new(&quiet_run, &FitOptions { kind: Some(Kind::Flow), quiet: true, ..opts.clone() })?;
    let (table, dims) = (probe.settings().clone(), probe.dim());
    drop(probe);
    let (mut racers, mut at) = line_up(&quiet_run, opts, &table, dims, saved)?;
    if saved.is_none() {
        at.elapsed = before;
    }
    let started = Instant::now().checked_sub(Duration::from_secs_f64(at.elapsed)).unwrap_or_else(Instant::now);
    let spent = |at: &Position| at.budget.is_some_and(|b| started.elapsed().as_secs_f64() >= b);
    while at.round < ROUNDS * (1 + MOST_LOCAL_ROUNDS) {
        let until = stages(at.round, table.epochs)[at.round % ROUNDS];
        while at.next < at.alive.len() {
            let i = at.alive[at.next];
            let first = at.round == 0 && i == 0;
            if spent(&at) && !first {
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
                // The first stage of the table's flow sets the default budget,
                // on top of the time the other kinds took.
                let b = before + default_budget(r, &racers, table.epochs);
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
        if at.round % ROUNDS == 0 {
            let done = at.round / ROUNDS;
            let left = at.budget.map_or(f64::INFINITY, |b| b - started.elapsed().as_secs_f64());
            let last: f64 =
                racers.iter().filter(|r| r.first_stage == at.round - ROUNDS).map(|r| r.flow.seconds()).sum();
            let winner_round = racers[winner(&racers)].first_stage / ROUNDS;
            if !another_round(done, winner_round, last, left, opts.budget.is_some()) {
                break;
            }
            let local = around_winner(&racers);
            at.alive = (racers.len()..racers.len() + local.len()).collect();
            racers.extend(enter(&quiet_run, local, at.round)?);
        }
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

/// The places of stage `stage` (0 for the first) of a round that `n`
/// flows began: all of them, then half as many (rounded up) each stage,
/// fixed in advance as successive halving fixes them.
fn places(n: usize, stage: usize) -> usize {
    (0..stage).fold(n, |places, _| places.div_ceil(2))
}

/// The end of a stage under successive halving's rule: ranks the round's
/// flows still in the race (`ranked`: those that trained the stage and
/// those that stopped early in it or before, on their best) by validation
/// NLL (`nll` of each) and gives the next stage's `places` by rank. Returns
/// the flows with a place still training, which carry on, and the flows
/// still training without one, each with its rank, which are cut. An
/// early-stopped flow needs no more epochs but keeps its rank, so it takes
/// a place only from flows it beats, and a flow that trails it does not
/// inherit its place; the places themselves do not shrink when flows stop,
/// so flows that learn slowly at first are not cut only because quicker
/// ones stopped.
fn halve_stage(
    ranked: &[usize],
    places: usize,
    nll: impl Fn(usize) -> f64,
    stopped: impl Fn(usize) -> bool,
) -> (Vec<usize>, Vec<(usize, usize)>) {
    let mut order = ranked.to_vec();
    order.sort_by(|&a, &b| nll(a).total_cmp(&nll(b)));
    let keep = places.min(order.len());
    let on = order[..keep].iter().copied().filter(|&i| !stopped(i)).collect();
    let cut = order.iter().enumerate().skip(keep).filter(|&(_, &i)| !stopped(i)).map(|(r, &i)| (i, r + 1)).collect();
    (on, cut)
}

/// End a stage: the next stage's places go by rank ([`halve_stage`]) among
/// the round's flows that trained this stage or stopped early; a finished
/// run stands on its best, and one the budget left waiting stops where it
/// is.
fn halve(racers: &mut [Racer], at: &mut Position) {
    let round = at.round;
    let which = match round / ROUNDS {
        0 => String::new(),
        1 => " of the local round".to_string(),
        k => format!(" of local round {k}"),
    };
    let stage = format!("stage {} of {ROUNDS}{which}", round % ROUNDS + 1);
    for &i in &at.alive {
        let r = &mut racers[i];
        if r.first_stage + r.stages.len() != round + 1 {
            r.stopped = Some(format!("budget spent before {stage}"));
        } else if r.flow.finished() {
            r.stopped = Some(r.flow.why_finished());
        }
    }
    let begun = round - round % ROUNDS;
    let round_flows: Vec<usize> = (0..racers.len()).filter(|&i| racers[i].first_stage == begun).collect();
    let next = places(round_flows.len(), round % ROUNDS + 1);
    // A flow cut before is paused, not finished; one that stopped early is
    // finished and stays in the ranking on its best.
    let ranked: Vec<usize> =
        round_flows.into_iter().filter(|&i| at.alive.contains(&i) || racers[i].flow.finished()).collect();
    let (on, cut) =
        halve_stage(&ranked, next, |i| racers[i].flow.best_validation_nll(), |i| racers[i].stopped.is_some());
    // After a round's last stage a flow still training was paused by the
    // budget, and the race's end says so.
    if (round + 1) % ROUNDS != 0 {
        for (i, rank) in cut {
            racers[i].stopped = Some(format!("halved out after {stage} (ranked {rank} for {next} places)"));
        }
    }
    at.alive = on;
    at.round += 1;
    at.next = 0;
}

/// Every flow's epochs so far, each marked with its configuration.
pub(super) fn race_log(racers: &[Racer]) -> Vec<LogEntry> {
    racers.iter().flat_map(|r| r.flow.log_as(&r.config.name)).collect()
}

pub(super) fn minutes(seconds: f64) -> String {
    if seconds < 120.0 {
        format!("{seconds:.0} s")
    } else {
        format!("{:.1} min", seconds / 60.0)
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

    /// Nine, five, three: the places successive halving gives each stage.
    #[test]
    fn each_stage_has_half_the_places_of_the_last() {
        assert_eq!((0..4).map(|s| places(9, s)).collect::<Vec<_>>(), [9, 5, 3, 2]);
        assert_eq!(places(1, 2), 1);
    }

    /// Nine flows began a round. After its first stage five places go by
    /// rank: two early-stopped flows hold two of them (3 and 5), so three
    /// carry on, and the flows still training below are cut with their
    /// ranks (7 stopped and is not). After the second stage three places go
    /// among the three still training and every early-stopped flow: flow 3
    /// keeps its place, so of the three only the best two carry on, and the
    /// third (0) is cut fourth, behind flow 3.
    #[test]
    fn early_stopped_flows_keep_their_rank_and_the_places_stay_fixed() {
        let nll = [5.0, 1.0, 4.0, 2.0, 6.0, 3.0, 9.0, 7.0, 8.0];
        let all: Vec<usize> = (0..9).collect();
        let stopped = |i: usize| [3, 5, 7].contains(&i);
        let (on, cut) = halve_stage(&all, places(9, 1), |i| nll[i], stopped);
        assert_eq!((on.clone(), cut), (vec![1, 2, 0], vec![(4, 6), (8, 8), (6, 9)]));
        let later = [0.5, 0.2, 2.5];
        let at = |i: usize| on.iter().position(|&j| j == i).map_or(nll[i], |k| later[k]);
        let ranked = [0, 1, 2, 3, 5, 7];
        assert_eq!(halve_stage(&ranked, places(9, 2), at, stopped), (vec![2, 1], vec![(0, 4)]));
        assert_eq!(halve_stage(&all, 5, |i| nll[i], |_| false).0, vec![1, 3, 5, 2, 0]);
        assert_eq!(halve_stage(&[0, 1, 2], 2, |_| 0.0, |_| false), (vec![0, 1], vec![(2, 3)]));
        assert_eq!(halve_stage(&[], 1, |_| 0.0, |_| false), (vec![], vec![]));
    }

    /// 10 epochs in the first round, 30 in the first local round, then
    /// twice as many each round as the schedule doubles.
    #[test]
    fn patience_grows_with_the_schedule_after_the_first_local_round() {
        assert_eq!(local_patience(10, true), 30);
        assert_eq!(local_patience(30, false), 60);
        assert_eq!(local_patience(60, false), 120);
    }

    #[test]
    fn the_local_round_runs_on_a_longer_schedule() {
        assert_eq!(stages(0, 200), [50, 100, 200]);
        assert_eq!(stages(ROUNDS - 1, 200), [50, 100, 200]);
        assert_eq!(stages(ROUNDS, 200), [100, 200, 400]);
        assert_eq!(stages(2 * ROUNDS - 1, 30), [15, 30, 60]);
        assert_eq!(stages(2 * ROUNDS, 200), [200, 400, 800]);
    }

    /// The first local round needs only time left; a further one a budget
    /// the user gave, the best flow from the round just run, room for twice
    /// its time, and no more than the most local rounds.
    #[test]
    fn further_local_rounds_need_a_given_budget_and_a_gain() {
        assert!(another_round(1, 0, 100.0, 1.0, false));
        assert!(!another_round(1, 0, 100.0, 0.0, true));
        assert!(another_round(2, 1, 100.0, 200.0, true));
        assert!(!another_round(2, 1, 100.0, 200.0, false), "the default budget buys one local round");
        assert!(!another_round(2, 0, 100.0, 1e9, true), "the last round found nothing better");
        assert!(!another_round(2, 1, 100.0, 199.0, true), "twice the last round's time does not fit");
        assert!(another_round(MOST_LOCAL_ROUNDS, MOST_LOCAL_ROUNDS - 1, 1.0, 1e9, true));
        assert!(!another_round(MOST_LOCAL_ROUNDS + 1, MOST_LOCAL_ROUNDS, 1.0, 1e9, true));
    }

    #[test]
    fn spline_couplings_race_when_the_table_already_models_every_dim() {
        // With 125 rows per feature the table models all 32 dims, so the
        // "all dims" configuration repeats it and is dropped; the spline
        // one differs only in its couplings and must stay.
        let opts = FitOptions::default();
        let table = Settings::resolve(&opts, 4000, 32, true, false).expect("valid settings");
        assert_eq!(table.flow_dims, 32);
        let names: Vec<String> = flow_configs(&opts, &table, 32).into_iter().map(|c| c.name).collect();
        assert!(names.iter().any(|n| n == "spline couplings"), "{names:?}");
        assert!(!names.iter().any(|n| n == "all dims"), "{names:?}");
    }

    /// Around a winner with neither dropout nor noise, "less" regularisation
    /// is the same as its own, so four neighbours remain: its own and more
    /// regularisation, each with either mixing, all on twice the epochs.
    #[test]
    fn the_local_round_steps_regularisation_and_mixing() {
        let opts = FitOptions { dropout: Some(0.0), noise: Some(0.0), ..FitOptions::default() };
        let table = Settings::resolve(&opts, 4000, 32, true, false).expect("valid settings");
        let winner = FlowConfig { name: "plain".into(), opts: opts.clone() };
        let local = local_configs(&winner, &table, local_patience(table.patience, true));
        let names: Vec<&str> = local.iter().map(|c| c.name.as_str()).collect();
        let e = 2 * table.epochs;
        assert_eq!(
            names,
            [
                format!("plain / {e} epochs"),
                format!("plain / LU mixing, {e} epochs"),
                format!("plain / more regularisation, {e} epochs"),
                format!("plain / more regularisation, LU mixing, {e} epochs"),
            ]
        );
        let more = &local[2].opts;
        assert_eq!((more.dropout, more.noise, more.weight_decay), (Some(0.1), Some(0.1), Some(1e-4)));
        assert!(local
            .iter()
            .all(|c| c.opts.epochs == Some(e) && c.opts.patience == Some(LOCAL_PATIENCE * table.patience)));
    }

    /// Above 76 dims the rule slows LU blocks, so the local round also
    /// tries them at the full rate: nine neighbours, and around a winner at
    /// the full rate the rule's rate is the alternative.
    #[test]
    fn wide_flows_race_lu_blocks_at_either_rate() {
        let opts = FitOptions::default();
        let table = Settings::resolve(&opts, 40_000, 128, true, false).expect("valid settings");
        assert_eq!((table.flow_dims, local_most(128), local_most(76)), (128, 9, 6));
        let winner = FlowConfig { name: "w".into(), opts: opts.clone() };
        let local = local_configs(&winner, &table, local_patience(table.patience, true));
        assert_eq!(local.len(), 9);
        let full =
            local.iter().find(|c| c.name == format!("w / LU mixing at the full rate, {} epochs", 2 * table.epochs));
        assert_eq!(full.map(|c| (c.opts.mixing, c.opts.lu_rate)), Some((Some(Mixing::Lu), Some(1.0))));
        let lu = FitOptions { mixing: Some(Mixing::Lu), lu_rate: Some(1.0), ..opts.clone() };
        let lu_table = Settings::resolve(&lu, 40_000, 128, true, false).expect("valid settings");
        assert_eq!((lu_table.lu_rate, lu_table.lu_block_rate()), (Some(1.0), 1.0));
        let around = local_configs(&FlowConfig { name: "w".into(), opts: lu }, &lu_table, 30);
        let rule = around.iter().find(|c| c.name == format!("w / LU mixing, {} epochs", 2 * table.epochs));
        assert_eq!(rule.map(|c| c.opts.lu_rate), Some(None));
        let by_rule = Settings::resolve(&rule.unwrap().opts, 40_000, 128, true, false).expect("valid settings");
        assert_eq!(by_rule.lu_block_rate(), lu_rate(128));
    }
}
