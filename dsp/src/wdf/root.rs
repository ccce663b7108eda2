/// R-type adaptor at the root of the tree, solved in nodal form (Werner, Smith, Abel, "Wave digital filter
/// adaptors for arbitrary topologies and multiport linear elements", DAFx-15, derive its scattering from the same
/// nodal analysis). Each subtree is a Thevenin edge (b_e, R_e) between two nodes: the current from the root into
/// it is G_e (v_plus - v_minus) - G_e b_e with G_e = 1/R_e, and its incident wave is a_e = 2 (v_plus - v_minus) - b_e.
/// The nonlinear devices connect to the same nodes; the stage writes Kirchhoff's current law at each node with
/// them and solves it (see `stage.rs`).
#[derive(Clone, Debug)]
pub struct RTypeRoot<const N: usize, const E: usize> {
    /// Each edge's (+, -) node as an index into `Extended` node voltages (ground at index N, always 0 V).
    edge_slots: [[usize; 2]; E],
    /// 1 / R_e per edge (S).
    conductance: [f64; E],
}

impl<const N: usize, const E: usize> RTypeRoot<N, E> {
    /// A root with `edges` given as (+ node, - node), nodes numbered 1..=N, 0 = ground.
    pub fn new(edges: [(usize, usize); E]) -> Self {
        const { assert!(N < EXTENDED, "RTypeRoot holds fewer than 8 nodes") };
        RTypeRoot {
            edge_slots: edges.map(|(plus, minus)| {
                let slot = |node: usize| if node > 0 { node - 1 } else { N };
                [slot(plus), slot(minus)]
            }),
            conductance: [0.0; E],
        }
    }

    /// Take the edges' port resistances (after any change of a subtree's resistances).
    pub fn update(&mut self, resistances: &[f64; E]) {
        for (g, r) in self.conductance.iter_mut().zip(resistances) {
            *g = 1.0 / r;
        }
    }

    /// Edge conductances G_e (S).
    #[inline(always)]
    pub fn conductances(&self) -> &[f64; E] {
        &self.conductance
    }

    /// Norton currents G_e b_e of the edges for their reflected waves `b` (A).
    #[inline(always)]
    pub fn norton_currents(&self, b: &[f64; E]) -> [f64; E] {
        let mut out = [0.0; E];
        for ((out, g), b) in out.iter_mut().zip(&self.conductance).zip(b) {
            *out = g * b;
        }
        out
    }

    /// Current leaving each node into the edges, for node voltages `nodes` and edge waves `b` (A).
    pub fn edge_currents_out(&self, b: &[f64; E], nodes: &[f64; N]) -> [f64; N] {
        let nodes = extended(nodes);
        let mut out = [0.0; EXTENDED];
        for ((g, b), [plus, minus]) in self.conductance.iter().zip(b).zip(&self.edge_slots) {
            let current = g * (nodes[plus % EXTENDED] - nodes[minus % EXTENDED] - b);
            out[plus % EXTENDED] += current;
            out[minus % EXTENDED] -= current;
        }
        let mut currents = [0.0; N];
        currents.copy_from_slice(&out[..N]);
        currents
    }

    /// Incident waves a_e = 2 v_e - b_e for the edges, from the solved node voltages.
    #[inline]
    pub fn incident_waves(&self, b: &[f64; E], nodes: &[f64; N]) -> [f64; E] {
        let nodes = extended(nodes);
        let mut a = [0.0; E];
        for ((out, [plus, minus]), wave) in a.iter_mut().zip(&self.edge_slots).zip(b) {
            *out = 2.0 * (nodes[plus % EXTENDED] - nodes[minus % EXTENDED]) - wave;
        }
        a
    }
}

const EXTENDED: usize = 8;

/// Node voltages followed by zeros, so ground (index N) reads 0 V.
#[inline(always)]
fn extended<const N: usize>(nodes: &[f64; N]) -> [f64; EXTENDED] {
    let mut out = [0.0; EXTENDED];
    out[..N].copy_from_slice(nodes);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Ohm's law on a divider: node 1 fed from 10 V through 1 k, 1 k to ground, sits at 5 V with no current out of
    /// the node; each edge then carries 5 mA, so its incident wave a = v + R i is 5 V + 5 V one way and 5 V - 5 V
    /// the other (a source edge's reflected wave is its source voltage, a resistor's is 0).
    #[test]
    fn divider_balances_at_half_supply() {
        let mut root = RTypeRoot::<1, 2>::new([(1, 0), (1, 0)]);
        root.update(&[1e3, 1e3]);
        let b = [10.0, 0.0];
        let net = root.edge_currents_out(&b, &[5.0]);
        assert!(net[0].abs() < 1e-15);
        let a = root.incident_waves(&b, &[5.0]);
        assert!(
            (a[0] - 0.0).abs() < 1e-12 && (a[1] - 10.0).abs() < 1e-12,
            "{a:?}"
        );
        assert!((root.norton_currents(&b)[0] - 10e-3).abs() < 1e-15);
    }
}
