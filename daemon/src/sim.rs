//! The in-process world: the simulated stage wired straight to the pipeline.
//!
//! [`SimLoop`] drives the simulated stage's [`SimBackend`] and the [`Pipeline`] in
//! lockstep: every control period it runs [`runtime::run_tick`] — the very tick the
//! real-time loop runs — on the stage's readings since the last tick (one per tiltmeter
//! period) and applies the heater commands to the stage. It has no clock of its own:
//! [`SimLoop::advance_to`] runs as fast as the CPU allows (virtual time); paced runs use
//! the real-time loop of [`runtime`] over the same backend. The control code is exactly
//! the one that runs on real hardware; only the scheduler and the I/O differ.

use stilt_hil_sim::SimStage;

use crate::core::cascade::Outputs;
use crate::pipeline::Pipeline;
use crate::rows::Quality;
use crate::runtime::{self, SimBackend};

/// What one control tick did, with the simulator's truth beside it.
#[derive(Debug, Clone)]
pub struct TickReport {
    /// Run time of the tick, s.
    pub t_s: f64,
    /// The controller's commands.
    pub outputs: Outputs,
    /// The plate's true tilt at the tick, µrad.
    pub true_tilt_urad: [f64; 2],
    /// The tilt the controller saw (mean over the tick), µrad, if usable.
    pub measured_tilt_urad: Option<[f64; 2]>,
}

/// The simulated stage and the pipeline, stepped in lockstep.
pub struct SimLoop {
    backend: SimBackend,
    pipeline: Pipeline,
    sample_period_s: f64,
    samples_per_tick: u64,
    ticks: u64,
}

impl SimLoop {
    /// Wires a stage to a pipeline (both built from the same configuration).
    pub fn new(stage: SimStage, pipeline: Pipeline) -> Self {
        let cfg = pipeline.config();
        let ratio = (cfg.tiltmeter.rate_hz / cfg.control.rate_hz)
            .round()
            .max(1.0) as u64;
        SimLoop {
            sample_period_s: 1.0 / cfg.tiltmeter.rate_hz,
            samples_per_tick: ratio,
            backend: SimBackend::with_stage(stage, cfg),
            pipeline,
            ticks: 0,
        }
    }

    /// Run time reached, s.
    pub fn time_s(&self) -> f64 {
        self.backend.time_s()
    }

    /// The pipeline (for commands and counters).
    pub fn pipeline_mut(&mut self) -> &mut Pipeline {
        &mut self.pipeline
    }

    /// The stage (for fault injection in tests).
    pub fn stage_mut(&mut self) -> &mut SimStage {
        self.backend.stage_mut()
    }

    /// Fault injection: every tilt reading arrives with this quality (e.g. `BadFrame`
    /// for garbled frames, `Timeout` for no reply) until set back to `None`.
    pub fn set_tilt_fault(&mut self, q: Option<Quality>) {
        self.backend.set_tilt_fault(q);
    }

    /// Runs until run time `t_end_s`, calling `on_tick` after every control tick. Each
    /// tick is [`runtime::run_tick`], exactly as the real-time loop runs it.
    pub fn advance_to(&mut self, t_end_s: f64, on_tick: &mut dyn FnMut(&TickReport)) {
        // Compare in whole samples so that float steps never add an extra one.
        let end = (t_end_s / self.sample_period_s + 1e-9).floor() as u64;
        loop {
            let next = (self.ticks + 1) * self.samples_per_tick;
            if next > end {
                // Up to the end without a tick: the readings wait for the next one.
                self.backend
                    .advance_samples_to(end as f64 * self.sample_period_s);
                return;
            }
            let t = next as f64 * self.sample_period_s;
            let (out, _) = runtime::run_tick(&mut self.pipeline, &mut self.backend, t);
            self.ticks += 1;
            on_tick(&self.backend.report(t, &out));
        }
    }

    /// Hands back the pipeline (to finish the run).
    pub fn into_pipeline(self) -> Pipeline {
        self.pipeline
    }
}
