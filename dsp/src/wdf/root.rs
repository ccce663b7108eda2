// Small dense matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

/// One end of a root port: ground, one of the root's nodes (1-based), or a fixed voltage (an ideal supply).
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Terminal {
    Ground,
    Node(usize),
    Fixed(f64),
}

/// R-type adaptor at the root of the tree with the nonlinear ports attached (Werner, Smith, Abel, "Wave digital
/// filter adaptors for arbitrary topologies and multiport linear elements", DAFx-15; K-method form of Werner et
/// al., "Resolving wave digital filters with multiple/multiport nonlinearities", DAFx-15). Each subtree is a
/// Thevenin edge (b_e, R_e) between two nodes; each nonlinear port draws current i_p from its + terminal. Nodal
/// analysis at set-up gives the node voltages x = X_b b + X_i i, hence the port voltages v = p + K i with the
/// open-circuit part p = D X_b b + offset (D: each port's terminal nodes), and the waves for the down pass.
#[derive(Clone, Debug)]
pub struct RTypeRoot<const N: usize, const E: usize, const P: usize> {
    edges: [(usize, usize); E],
    ports: [(Terminal, Terminal); P],
    /// d(port voltage) / d(port current), K in the K-method.
    pub port_from_current: [[f64; P]; P],
    /// Port voltage contributed by fixed terminals.
    pub port_offset: [f64; P],
    /// Node voltages per unit edge wave and per unit port current, by columns (each column scales one input
    /// in the per-sample products).
    node_wave_columns: [[f64; N]; E],
    node_current_columns: [[f64; N]; P],
    /// Each edge's (+, -) node as an index into `Extended` node voltages (ground at index N, always 0 V).
    edge_slots: [[usize; 2]; E],
    /// The same for each port's terminals (a fixed terminal reads ground there; its voltage is in `port_offset`).
    port_slots: [[usize; 2]; P],
}

impl<const N: usize, const E: usize, const P: usize> RTypeRoot<N, E, P> {
    /// A root with `edges` given as (+ node, - node), 0 = ground, and the nonlinear `ports`.
    pub fn new(edges: [(usize, usize); E], ports: [(Terminal, Terminal); P]) -> Self {
        const { assert!(N < EXTENDED, "RTypeRoot holds fewer than 8 nodes") };
        RTypeRoot {
            edges,
            ports,
            port_from_current: [[0.0; P]; P],
            port_offset: [0.0; P],
            port_slots: ports.map(|(plus, minus)| {
                let slot = |terminal: Terminal| match terminal {
                    Terminal::Node(k) => k - 1,
                    Terminal::Ground | Terminal::Fixed(_) => N,
                };
                [slot(plus), slot(minus)]
            }),
            node_wave_columns: [[0.0; N]; E],
            node_current_columns: [[0.0; N]; P],
            edge_slots: edges.map(|(plus, minus)| {
                let slot = |node: usize| if node > 0 { node - 1 } else { N };
                [slot(plus), slot(minus)]
            }),
        }
    }

    /// Recompute the scattering for new edge port resistances (no allocation; a few microseconds).
    pub fn update(&mut self, resistances: &[f64; E]) {
        let mut g = [[0.0f64; N]; N];
        for (e, &(plus, minus)) in self.edges.iter().enumerate() {
            let conductance = 1.0 / resistances[e];
            for (x, sx) in [(plus, 1.0), (minus, -1.0)] {
                for (y, sy) in [(plus, 1.0), (minus, -1.0)] {
                    if x > 0 && y > 0 {
                        g[x - 1][y - 1] += sx * sy * conductance;
                    }
                }
            }
        }
        let inverse = invert(g);
        // Node voltages per unit edge wave: injection b/R at + and -b/R at -.
        for e in 0..E {
            let (plus, minus) = self.edges[e];
            let conductance = 1.0 / resistances[e];
            for n in 0..N {
                let mut sum = 0.0;
                if plus > 0 {
                    sum += inverse[n][plus - 1];
                }
                if minus > 0 {
                    sum -= inverse[n][minus - 1];
                }
                self.node_wave_columns[e][n] = sum * conductance;
            }
        }
        // Node voltages per unit port current: drawn from the + node, returned to the - node.
        for p in 0..P {
            let (plus, minus) = self.ports[p];
            for n in 0..N {
                let mut sum = 0.0;
                if let Terminal::Node(k) = plus {
                    sum -= inverse[n][k - 1];
                }
                if let Terminal::Node(k) = minus {
                    sum += inverse[n][k - 1];
                }
                self.node_current_columns[p][n] = sum;
            }
        }
        for p in 0..P {
            let (plus, minus) = self.ports[p];
            let mut offset = 0.0;
            let mut current = [0.0; P];
            for (terminal, sign) in [(plus, 1.0), (minus, -1.0)] {
                match terminal {
                    Terminal::Ground => {}
                    Terminal::Fixed(v) => offset += sign * v,
                    Terminal::Node(k) => {
                        for q in 0..P {
                            current[q] += sign * self.node_current_columns[q][k - 1];
                        }
                    }
                }
            }
            self.port_offset[p] = offset;
            self.port_from_current[p] = current;
        }
    }

    /// Node voltages with no port current for the reflected waves `b` of the edges (edges whose wave is
    /// exactly zero, as a resistor's always is, are skipped).
    #[inline]
    pub fn open_node_voltages(&self, b: &[f64; E]) -> [f64; N] {
        let mut x = [0.0; N];
        for (column, wave) in self.node_wave_columns.iter().zip(b) {
            if *wave != 0.0 {
                for (out, m) in x.iter_mut().zip(column) {
                    *out += m * wave;
                }
            }
        }
        x
    }

    /// Open-circuit port voltages (the K-method's p vector) from the open node voltages.
    #[inline]
    pub fn open_port_voltages(&self, open_nodes: &[f64; N]) -> [f64; P] {
        let nodes = extended(open_nodes);
        let mut p = self.port_offset;
        for (out, [plus, minus]) in p.iter_mut().zip(&self.port_slots) {
            *out += nodes[plus % EXTENDED] - nodes[minus % EXTENDED];
        }
        p
    }

    /// Node voltages once the port currents are known, from the open node voltages.
    #[inline]
    pub fn node_voltages(&self, open_nodes: &[f64; N], currents: &[f64; P]) -> [f64; N] {
        let mut x = *open_nodes;
        for (column, current) in self.node_current_columns.iter().zip(currents) {
            for (out, m) in x.iter_mut().zip(column) {
                *out += m * current;
            }
        }
        x
    }

    /// Incident waves for the subtrees, a_e = 2 v_e - b_e.
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

/// Length of the node voltages extended by ground (index N): indices taken modulo it need no bounds check.
const EXTENDED: usize = 8;

/// Node voltages followed by zeros, so ground (index N) reads 0 V.
#[inline(always)]
fn extended<const N: usize>(nodes: &[f64; N]) -> [f64; EXTENDED] {
    let mut out = [0.0; EXTENDED];
    out[..N].copy_from_slice(nodes);
    out
}

/// Gauss-Jordan inverse with partial pivoting of a small nonsingular matrix.
fn invert<const N: usize>(mut m: [[f64; N]; N]) -> [[f64; N]; N] {
    let mut inv = [[0.0; N]; N];
    for (i, row) in inv.iter_mut().enumerate() {
        row[i] = 1.0;
    }
    for col in 0..N {
        let mut pivot = col;
        for row in col + 1..N {
            if m[row][col].abs() > m[pivot][col].abs() {
                pivot = row;
            }
        }
        m.swap(col, pivot);
        inv.swap(col, pivot);
        let d = 1.0 / m[col][col];
        for k in 0..N {
            m[col][k] *= d;
            inv[col][k] *= d;
        }
        for row in 0..N {
            if row != col {
                let f = m[row][col];
                if f != 0.0 {
                    for k in 0..N {
                        m[row][k] -= f * m[col][k];
                        inv[row][k] -= f * inv[col][k];
                    }
                }
            }
        }
    }
    inv
}

/// Solve the small dense system `a x = r` in place by Gaussian elimination with partial pivoting.
#[inline(always)]
pub fn solve_in_place<const P: usize>(a: &mut [[f64; P]; P], r: &mut [f64; P]) {
    for col in 0..P {
        let mut pivot = col;
        let mut largest = a[col][col].abs();
        for row in col + 1..P {
            let m = a[row][col].abs();
            if m > largest {
                pivot = row;
                largest = m;
            }
        }
        if pivot != col {
            a.swap(col, pivot);
            r.swap(col, pivot);
        }
        let d = a[col][col];
        let d = if d.abs() < 1e-300 { 1e-300 } else { d };
        let inv = 1.0 / d;
        a[col][col] = d;
        let pivot_row = a[col];
        let pivot_r = r[col];
        for row in col + 1..P {
            let f = a[row][col] * inv;
            for k in col + 1..P {
                a[row][k] -= f * pivot_row[k];
            }
            r[row] -= f * pivot_r;
        }
    }
    for col in (0..P).rev() {
        let mut sum = r[col];
        for k in col + 1..P {
            sum -= a[col][k] * r[k];
        }
        r[col] = sum / a[col][col];
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn divider_with_current_port() {
        // Node 1 fed by a 10 V source through 1 k, 1 k to ground: open voltage 5 V, Thevenin 500 ohm.
        let mut root =
            RTypeRoot::<1, 2, 1>::new([(1, 0), (1, 0)], [(Terminal::Node(1), Terminal::Ground)]);
        root.update(&[1e3, 1e3]);
        let p = root.open_port_voltages(&root.open_node_voltages(&[10.0, 0.0]));
        assert!((p[0] - 5.0).abs() < 1e-12);
        assert!((root.port_from_current[0][0] + 500.0).abs() < 1e-9);
    }
}
