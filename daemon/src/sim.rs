//! The in-process world: the simulated stage wired straight to the pipeline.
//!
//! [`SimLoop`] advances the [`SimStage`] one tiltmeter period at a time, hands every
//! reading to the [`Pipeline`], runs a control tick every `tiltmeter rate / control
//! rate` readings, and applies the heater commands to the stage. It has no clock of its
//! own: [`SimLoop::advance_to`] runs as fast as the CPU allows (virtual time), and a
//! paced driver calls it from a timer to run at wall-clock rate or a speed factor.
//! The control code is exactly the one that runs on real hardware; only the
//! scheduler and the I/O differ.

use stilt_hil_sim::SimStage;

use crate::core::cascade::Outputs;
use crate::pipeline::Pipeline;
use crate::rows::Quality;

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
    stage: SimStage,
    pipeline: Pipeline,
    sample_period_s: f64,
    samples_per_tick: u64,
    sample: u64,
    meas_acc: ([f64; 2], u32),
    tilt_fault: Option<Quality>,
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
            stage,
            pipeline,
            sample: 0,
            meas_acc: ([0.0; 2], 0),
            tilt_fault: None,
        }
    }

    /// Run time reached, s.
    pub fn time_s(&self) -> f64 {
        self.sample as f64 * self.sample_period_s
    }

    /// The pipeline (for commands and counters).
    pub fn pipeline_mut(&mut self) -> &mut Pipeline {
        &mut self.pipeline
    }

    /// The stage (for fault injection in tests).
    pub fn stage_mut(&mut self) -> &mut SimStage {
        &mut self.stage
    }

    /// Fault injection: every tilt reading arrives with this quality (e.g. `BadFrame`
    /// for garbled frames, `Timeout` for no reply) until set back to `None`.
    pub fn set_tilt_fault(&mut self, q: Option<Quality>) {
        self.tilt_fault = q;
    }

    /// Advances one tiltmeter period; returns the tick's report when a tick ran.
    pub fn step(&mut self) -> Option<TickReport> {
        self.stage.advance(self.sample_period_s);
        self.sample += 1;
        let t = self.time_s();
        let r = self.stage.read_tilt();
        let q = match self.tilt_fault {
            Some(f) => f,
            None if r.in_range => Quality::Ok,
            None => Quality::OutOfRange,
        };
        self.pipeline.on_tilt(t, r.raw, q);
        if q == Quality::Ok {
            let cal = self.pipeline.config().tiltmeter.calibrate(r.raw);
            self.meas_acc.0[0] += cal[0];
            self.meas_acc.0[1] += cal[1];
            self.meas_acc.1 += 1;
        }
        if self.sample % self.samples_per_tick != 0 {
            return None;
        }
        let temps: Vec<(f64, Quality)> = self
            .pipeline
            .config()
            .legs
            .iter()
            .map(|l| l.thermometer_channel)
            .collect::<Vec<_>>()
            .into_iter()
            .map(|ch| match self.stage.read_thermometer(ch) {
                Some(t) => (t, Quality::Ok),
                None => (f64::NAN, Quality::Missing),
            })
            .collect();
        let delivered: Vec<Option<f64>> = self
            .stage
            .truth()
            .heater_power_w
            .into_iter()
            .map(Some)
            .collect();
        self.pipeline.set_readback(&delivered);
        let outputs = self.pipeline.on_tick(t, &temps);
        for (i, p) in outputs.power_w.iter().enumerate() {
            self.stage.set_heater_power(i, *p);
        }
        let (sum, n) = std::mem::take(&mut self.meas_acc);
        let measured = (n > 0).then(|| [sum[0] / f64::from(n), sum[1] / f64::from(n)]);
        Some(TickReport {
            t_s: t,
            outputs,
            true_tilt_urad: self.stage.plate_tilt_urad(),
            measured_tilt_urad: measured,
        })
    }

    /// Runs until run time `t_end_s`, calling `on_tick` after every control tick.
    pub fn advance_to(&mut self, t_end_s: f64, on_tick: &mut dyn FnMut(&TickReport)) {
        // Compare in whole samples so that float steps never add an extra one.
        let end = (t_end_s / self.sample_period_s + 1e-9).floor() as u64;
        while self.sample < end {
            if let Some(r) = self.step() {
                on_tick(&r);
            }
        }
    }

    /// Hands back the pipeline (to finish the run).
    pub fn into_pipeline(self) -> Pipeline {
        self.pipeline
    }
}
