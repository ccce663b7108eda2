//! The circuit as a list of nodes and parts, assembled from the circuit file in signal order from the input jack.
//! `Netlist::build` reads as the schematic does (docs/model.md section 3); the solver (`nodal.rs`) takes the
//! lists and knows nothing of what the parts are for. Nodes are numbered in the order they are made, which is
//! signal order, so each node meets only its neighbours and the node equations stay banded.

use crate::circuit::{Circuit, GainControl, Network, Placement};
use crate::devices::triode::TubeType;
use crate::elements::{Capacitor, Knob, Pot, Resistor, Terminal};
use crate::pot::PotLaw;

/// A given voltage: a supply rail or the input jack.
#[derive(Clone, Debug, PartialEq)]
pub struct Source {
    pub name: String,
    pub volts: f64,
}

/// A triode and the terminals its plate, grid and cathode go to.
#[derive(Clone, Debug, PartialEq)]
pub struct Valve {
    /// "preamp stage 1", "gain stage", "follower".
    pub name: String,
    pub tube: TubeType,
    pub plate: Terminal,
    pub grid: Terminal,
    pub cathode: Terminal,
    /// The B+ its plate works from (V).
    pub supply_volts: f64,
    /// The series resistor into its grid (ohm), for grid-current readouts; None for the follower (DC coupled).
    pub grid_stopper: Option<f64>,
}

/// Every node and part of one circuit.
#[derive(Clone, Debug, PartialEq)]
pub struct Netlist {
    /// Node names, indexed as `Terminal::Node`.
    pub nodes: Vec<String>,
    pub sources: Vec<Source>,
    pub resistors: Vec<Resistor>,
    pub capacitors: Vec<Capacitor>,
    pub pots: Vec<Pot>,
    /// The valves in signal order: the preamp stages, the gain stage, the follower.
    pub valves: Vec<Valve>,
    /// The input jack (a source).
    pub jack: usize,
    /// Where the gain setting acts.
    pub gain_control: GainControl,
    /// The node the Zener pair connects to (to ground).
    pub clamp_node: usize,
    /// The level pot's wiper.
    pub level_wiper: usize,
    /// The tone stack's output, when there is a stack.
    pub tone: Option<usize>,
    /// Each preamp stage's plate node, in order (probes plate1, plate2, ...).
    pub preamp_plates: Vec<usize>,
}

/// Makes nodes and parts, naming each.
struct Builder {
    net: Netlist,
}

impl Builder {
    fn node(&mut self, name: impl Into<String>) -> Terminal {
        self.net.nodes.push(name.into());
        Terminal::Node(self.net.nodes.len() - 1)
    }
    fn source(&mut self, name: impl Into<String>, volts: f64) -> Terminal {
        self.net.sources.push(Source {
            name: name.into(),
            volts,
        });
        Terminal::Source(self.net.sources.len() - 1)
    }
    fn resistor(&mut self, name: impl Into<String>, a: Terminal, b: Terminal, resistance: f64) {
        self.net.resistors.push(Resistor {
            name: name.into(),
            a,
            b,
            resistance,
        });
    }
    /// A capacitor; 0 F means the part is not fitted.
    fn capacitor(&mut self, name: impl Into<String>, a: Terminal, b: Terminal, capacitance: f64) {
        if capacitance > 0.0 {
            self.net.capacitors.push(Capacitor {
                name: name.into(),
                a,
                b,
                capacitance,
            });
        }
    }
    #[allow(clippy::too_many_arguments)]
    fn pot(
        &mut self,
        name: impl Into<String>,
        (top, wiper, bottom): (Option<Terminal>, Terminal, Option<Terminal>),
        resistance: f64,
        law: PotLaw,
        knob: Option<Knob>,
        rotation: f64,
    ) {
        self.net.pots.push(Pot {
            name: name.into(),
            top,
            wiper,
            bottom,
            resistance,
            law,
            knob,
            rotation,
        });
    }
    fn valve(&mut self, valve: Valve) {
        self.net.valves.push(valve);
    }
    fn node_index(t: Terminal) -> usize {
        t.node().expect("made by Builder::node")
    }
}

const GROUND: Terminal = Terminal::Ground;

impl Netlist {
    /// The circuit of `circuit`, as the schematic reads, with every pot at rotation 0.5 until a setting moves it.
    pub fn build(circuit: &Circuit) -> Netlist {
        let mut b = Builder {
            net: Netlist {
                nodes: Vec::new(),
                sources: Vec::new(),
                resistors: Vec::new(),
                capacitors: Vec::new(),
                pots: Vec::new(),
                valves: Vec::new(),
                jack: 0,
                gain_control: circuit.gain_control(),
                clamp_node: 0,
                level_wiper: 0,
                tone: None,
                preamp_plates: Vec::new(),
            },
        };
        // The input jack: the DI as an ideal source (times the ideal attenuator's law when that is the gain
        // control), its resistor to ground (in parallel with an ideal source it changes nothing; listed as a part).
        let jack = b.source("jack", 0.0);
        if !circuit.preamp.is_empty() {
            b.resistor("input_resistor", jack, GROUND, circuit.input.input_resistor);
        }

        // Each stage before the gain stage: stopper into the grid, plate resistor from its B+, cathode resistor
        // (and bypass), coupling cap into the network that feeds the next grid.
        let mut signal = jack;
        for (index, stage) in circuit.preamp.iter().enumerate() {
            let k = index + 1;
            let name = format!("preamp stage {k}");
            let grid = b.node(format!("grid{k}"));
            let cathode = b.node(format!("cathode{k}"));
            let plate = b.node(format!("plate{k}"));
            let supply = circuit.preamp_supply(index);
            let rail = b.source(format!("supply{k}"), supply);
            b.resistor(
                format!("{name} grid_stopper"),
                signal,
                grid,
                stage.grid_stopper,
            );
            b.resistor(
                format!("{name} plate_resistor"),
                rail,
                plate,
                stage.plate_resistor,
            );
            b.resistor(
                format!("{name} cathode_resistor"),
                cathode,
                GROUND,
                stage.cathode_resistor,
            );
            b.capacitor(
                format!("{name} cathode_bypass"),
                cathode,
                GROUND,
                stage.cathode_bypass,
            );
            b.valve(Valve {
                name: name.clone(),
                tube: stage.tube,
                plate,
                grid,
                cathode,
                supply_volts: supply,
                grid_stopper: Some(stage.grid_stopper),
            });
            b.net.preamp_plates.push(Builder::node_index(plate));
            let network = b.node(format!("network{k}"));
            b.capacitor(
                format!("{name} coupling_cap"),
                plate,
                network,
                stage.coupling_cap,
            );
            signal = match &stage.network {
                Network::GridLeak(r) => {
                    b.resistor(format!("{name} grid_leak"), network, GROUND, *r);
                    network
                }
                Network::Volume(v) => {
                    let wiper = b.node(format!("volume{k}"));
                    let knob = v.control.map(|_| Knob::Gain);
                    let rotation = v.rotation.unwrap_or(0.5);
                    b.pot(
                        format!("{name} volume"),
                        (Some(network), wiper, Some(GROUND)),
                        v.resistance,
                        v.law,
                        knob,
                        rotation,
                    );
                    b.capacitor(format!("{name} bright_cap"), network, wiper, v.bright_cap);
                    wiper
                }
                Network::Divider(d) => {
                    let middle = b.node(format!("divider{k}"));
                    b.resistor(format!("{name} divider series"), network, middle, d.series);
                    b.capacitor(
                        format!("{name} divider series_cap"),
                        network,
                        middle,
                        d.series_cap,
                    );
                    b.resistor(format!("{name} divider shunt"), middle, GROUND, d.shunt);
                    middle
                }
            };
        }

        // The gain stage: its plate drives the follower's grid directly.
        let g = &circuit.gain_stage;
        let gain_grid = b.node("gain_grid");
        let gain_cathode = b.node("gain_cathode");
        let gain_plate = b.node("gain_plate");
        let gain_supply = circuit.gain_stage_supply();
        let gain_rail = b.source("gain_stage supply", gain_supply);
        b.resistor("gain_stage grid_stopper", signal, gain_grid, g.grid_stopper);
        b.resistor(
            "gain_stage plate_resistor",
            gain_rail,
            gain_plate,
            g.plate_resistor,
        );
        b.resistor(
            "gain_stage cathode_resistor",
            gain_cathode,
            GROUND,
            g.cathode_resistor,
        );
        b.capacitor(
            "gain_stage cathode_bypass",
            gain_cathode,
            GROUND,
            g.cathode_bypass,
        );
        b.valve(Valve {
            name: "gain stage".into(),
            tube: g.tube,
            plate: gain_plate,
            grid: gain_grid,
            cathode: gain_cathode,
            supply_volts: gain_supply,
            grid_stopper: Some(g.grid_stopper),
        });

        // The cathode follower: plate at the top-level B+.
        let follower_cathode = b.node("follower_cathode");
        let follower_rail = b.source("supply", circuit.supply_volts);
        b.resistor(
            "follower cathode_resistor",
            follower_cathode,
            GROUND,
            circuit.follower.cathode_resistor,
        );
        b.valve(Valve {
            name: "follower".into(),
            tube: circuit.follower.tube,
            plate: follower_rail,
            grid: gain_plate,
            cathode: follower_cathode,
            supply_volts: circuit.supply_volts,
            grid_stopper: None,
        });

        // The clamp: coupling cap, feed resistor, the level pot; the Zeners at its top or its wiper.
        let c = &circuit.clamp;
        let coupling_out = b.node("coupling_out");
        let level_top = b.node("level_top");
        let level_wiper = b.node("level_wiper");
        b.capacitor(
            "clamp coupling_cap",
            follower_cathode,
            coupling_out,
            c.coupling_cap,
        );
        b.resistor(
            "clamp feed_resistor",
            coupling_out,
            level_top,
            c.feed_resistor,
        );
        b.pot(
            "clamp level_pot",
            (Some(level_top), level_wiper, Some(GROUND)),
            c.level_pot,
            c.level_pot_law,
            Some(Knob::Level),
            0.5,
        );
        if let Some(load) = c.load_resistor {
            b.resistor("clamp load_resistor", level_wiper, GROUND, load);
        }
        b.net.clamp_node = Builder::node_index(match c.placement {
            Placement::AcrossPot => level_top,
            Placement::AtWiper => level_wiper,
        });
        b.net.level_wiper = Builder::node_index(level_wiper);

        // The tone stack, driven by the level pot's wiper and loading it (docs/model.md section 3.1). Nodes in
        // the order that keeps the band narrowest (three either side of the diagonal).
        if let Some(t) = &circuit.tone_stack {
            let treble_top = b.node("treble_top");
            let slope_node = b.node("slope_node");
            let tone = b.node("tone");
            let bass_top = b.node("bass_top");
            let middle_wiper = b.node("middle_wiper");
            let middle_top = b.node("middle_top");
            b.capacitor(
                "tone_stack treble_cap",
                level_wiper,
                treble_top,
                t.treble_cap,
            );
            b.resistor(
                "tone_stack slope_resistor",
                level_wiper,
                slope_node,
                t.slope_resistor,
            );
            b.capacitor("tone_stack bass_cap", slope_node, bass_top, t.bass_cap);
            b.capacitor(
                "tone_stack middle_cap",
                slope_node,
                middle_wiper,
                t.middle_cap,
            );
            b.pot(
                "tone_stack treble_pot",
                (Some(treble_top), tone, Some(bass_top)),
                t.treble_pot.resistance,
                t.treble_pot.law,
                Some(Knob::Treble),
                0.5,
            );
            // Bass: top lug and wiper joined at bass_top, so only the leg R y to middle_top is in circuit.
            b.pot(
                "tone_stack bass_pot",
                (None, bass_top, Some(middle_top)),
                t.bass_pot.resistance,
                t.bass_pot.law,
                Some(Knob::Bass),
                0.5,
            );
            b.pot(
                "tone_stack middle_pot",
                (Some(middle_top), middle_wiper, Some(GROUND)),
                t.middle_pot.resistance,
                t.middle_pot.law,
                Some(Knob::Middle),
                0.5,
            );
            b.resistor("tone_stack load_resistor", tone, GROUND, t.load_resistor);
            b.net.tone = Some(Builder::node_index(tone));
        }
        b.net.jack = match jack {
            Terminal::Source(i) => i,
            _ => unreachable!("the jack is a source"),
        };
        b.net
    }

    /// Index of the node called `name`.
    pub fn node_named(&self, name: &str) -> Option<usize> {
        self.nodes.iter().position(|n| n == name)
    }

    /// The pots a knob turns.
    pub fn pots_of(&self, knob: Knob) -> impl Iterator<Item = usize> + '_ {
        self.pots
            .iter()
            .enumerate()
            .filter(move |(_, p)| p.knob == Some(knob))
            .map(|(i, _)| i)
    }
}
