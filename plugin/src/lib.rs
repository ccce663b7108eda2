//! Breakdown plugin: the `breakdown-dsp` model of the builder's circuit (a preamp, a cathode follower and a
//! switched back-to-back Zener clamp, read from a circuit file) as a CLAP and VST3 plugin with instant,
//! level-matched comparison of the circuit's switch positions and a freely set candidate pair, and an egui
//! editor.

pub mod analysis;
pub mod editor;
pub mod ir;
pub mod loudness;
pub mod params;
pub mod presets;
pub mod runtime;
pub mod session;
pub mod shared;
pub mod state;

pub use params::controls_from;

use nice_plug::prelude::*;
use nice_plug_egui::{
    create_egui_editor, EguiEditor, EguiEditorState, EguiNiceSettings, RepaintNotifier,
};
use params::BreakdownParams;
use runtime::{BlockActions, Processor, Worker};
use shared::Shared;
use std::sync::Arc;

/// CLAP plugin id.
pub const CLAP_ID: &str = "org.breakdown-project.breakdown";

pub struct Breakdown {
    params: Arc<BreakdownParams>,
    shared: Arc<Shared>,
    worker: Arc<Worker>,
    processor: Option<Processor>,
    editor_state: Arc<EguiEditorState>,
    /// Standalone only: a synthetic input tone when `BREAKDOWN_DEMO_INPUT` is set (for the headless screenshot,
    /// whose dummy audio backend delivers silence).
    #[cfg(feature = "standalone")]
    demo: Option<DemoTone>,
}

/// A steady 196 Hz sine at 0.9 of full scale, for the standalone's demo input (every harmonic the spectrum
/// shows then comes from the modelled stage).
#[cfg(feature = "standalone")]
pub struct DemoTone {
    phase: f64,
    step: f64,
}

#[cfg(feature = "standalone")]
impl DemoTone {
    fn fill(&mut self, channels: &mut [&mut [f32]], rate: f64) {
        self.step = 196.0 / rate;
        let frames = channels.iter().map(|c| c.len()).min().unwrap_or(0);
        for n in 0..frames {
            let w = 2.0 * std::f64::consts::PI * self.phase;
            let x = (0.9 * w.sin()) as f32;
            for c in channels.iter_mut() {
                c[n] = x;
            }
            self.phase = (self.phase + self.step).fract();
        }
    }
}

impl Default for Breakdown {
    fn default() -> Self {
        let params = Arc::new(BreakdownParams::default());
        let worker = Arc::new(Worker::new(params.session.clone()));
        Breakdown {
            params,
            shared: Arc::new(Shared::default()),
            worker,
            processor: None,
            editor_state: editor::default_state(),
            #[cfg(feature = "standalone")]
            demo: std::env::var_os("BREAKDOWN_DEMO_INPUT").map(|_| DemoTone {
                phase: 0.0,
                step: 0.0,
            }),
        }
    }
}

/// Work for the background thread.
pub enum Task {
    /// Read a changed session's circuit, build requested models and free retired ones.
    Service,
}

impl Breakdown {
    /// Tell the host and the worker what the last block asks for.
    fn apply(actions: BlockActions, context: &mut impl ProcessContext<Self>) {
        if let Some(latency) = actions.latency {
            context.set_latency_samples(latency);
        }
        if actions.service_worker {
            context.execute_background(Task::Service);
        }
    }
}

impl Plugin for Breakdown {
    const NAME: &'static str = "Breakdown";
    const VENDOR: &'static str = "Breakdown project";
    const URL: &'static str = "";
    const EMAIL: &'static str = "";
    const VERSION: &'static str = env!("CARGO_PKG_VERSION");

    const AUDIO_IO_LAYOUTS: &'static [AudioIOLayout] = &[
        AudioIOLayout {
            main_input_channels: NonZeroU32::new(2),
            main_output_channels: NonZeroU32::new(2),
            ..AudioIOLayout::const_default()
        },
        AudioIOLayout {
            main_input_channels: NonZeroU32::new(1),
            main_output_channels: NonZeroU32::new(1),
            ..AudioIOLayout::const_default()
        },
        AudioIOLayout {
            main_input_channels: NonZeroU32::new(1),
            main_output_channels: NonZeroU32::new(2),
            ..AudioIOLayout::const_default()
        },
    ];

    type Editor = EguiEditor<editor::App>;
    type SysExMessage = ();
    type BackgroundTask = Task;

    fn task_executor(&mut self) -> TaskExecutor<Self> {
        let worker = self.worker.clone();
        Box::new(move |task| match task {
            Task::Service => worker.service(),
        })
    }

    fn params(&self) -> Arc<dyn Params> {
        self.params.clone()
    }

    fn editor(&mut self, _async_executor: AsyncExecutor<Self>) -> Option<Self::Editor> {
        create_egui_editor(
            self.editor_state.clone(),
            RepaintNotifier::new(),
            EguiNiceSettings::new().with_tile("Breakdown"),
            editor::App::new(self.params.clone(), self.shared.clone()),
        )
    }

    fn filter_state(state: &mut PluginState) {
        state::repair_state(state);
    }

    fn activate(
        &mut self,
        audio_io_layout: &AudioIOLayout,
        buffer_config: &BufferConfig,
        context: &mut impl ActivateContext<Self>,
    ) -> bool {
        let channels = audio_io_layout
            .main_input_channels
            .map(|n| n.get() as usize)
            .unwrap_or(1);
        let controls = controls_from(&self.params);
        match Processor::new(
            buffer_config.sample_rate as f64,
            channels,
            &controls,
            self.worker.clone(),
            self.shared.clone(),
        ) {
            Ok(p) => {
                context.set_latency_samples(p.latency());
                self.processor = Some(p);
                true
            }
            Err(e) => {
                nice_error!("Breakdown cannot start: {e}");
                false
            }
        }
    }

    fn reset(&mut self) {
        let controls = controls_from(&self.params);
        if let Some(p) = self.processor.as_mut() {
            p.reset(&controls);
        }
    }

    fn process(
        &mut self,
        buffer: &mut Buffer,
        _aux: &mut AuxiliaryBuffers,
        context: &mut impl ProcessContext<Self>,
    ) -> ProcessStatus {
        let controls = controls_from(&self.params);
        let Some(p) = self.processor.as_mut() else {
            return ProcessStatus::Normal;
        };
        #[cfg(feature = "standalone")]
        if let Some(tone) = self.demo.as_mut() {
            tone.fill(buffer.as_slice(), p.sample_rate());
        }
        let actions = p.process(&controls, buffer.as_slice());
        Self::apply(actions, context);
        ProcessStatus::Normal
    }
}

impl ClapPlugin for Breakdown {
    const CLAP_ID: &'static str = CLAP_ID;
    const CLAP_DESCRIPTION: Option<&'static str> =
        Some("Audition the Zener clamp positions of your own circuit file, level-matched");
    const CLAP_MANUAL_URL: Option<&'static str> = None;
    const CLAP_SUPPORT_URL: Option<&'static str> = None;
    const CLAP_FEATURES: &'static [ClapFeature] = &[
        ClapFeature::AudioEffect,
        ClapFeature::Distortion,
        ClapFeature::Mono,
        ClapFeature::Stereo,
    ];
}

impl Vst3Plugin for Breakdown {
    const VST3_CLASS_ID: [u8; 16] = *b"BreakdownZenerCl";
    const VST3_SUBCATEGORIES: &'static [Vst3SubCategory] =
        &[Vst3SubCategory::Fx, Vst3SubCategory::Distortion];
}

nice_export_clap!(Breakdown);
nice_export_vst3!(Breakdown);
