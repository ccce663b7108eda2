//! Buyable Zener parts: the 1 W 1N4728A-1N4764A family table and the E24 voltage series.

use crate::devices::zener::ZenerDatasheet;

/// The Vz range of every part Breakdown accepts (V): the span of the two families below (1N52xxB from 2.4 V,
/// 1N47xxA and 1N52xxB up to 200 V). A part given by Vz alone takes its knee data from the chosen family's table
/// (interpolated between rows, the end row beyond the family's own range).
pub const ZENER_VOLTS_RANGE: (f64, f64) = (2.4, 200.0);

/// One row of a family datasheet table.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct FamilyRow {
    pub part_number: &'static str,
    pub sheet: ZenerDatasheet,
}

/// Family of parts sharing a package and power rating.
#[derive(Clone, Copy, Debug)]
pub struct Family {
    pub name: &'static str,
    /// Rated power dissipation at 25 C lead temperature (W).
    pub power_rating_watts: f64,
    pub rows: &'static [FamilyRow],
}

macro_rules! rows {
    ($( $pn:literal $v:literal $izt:literal $zzt:literal $izk:literal $zzk:literal ;)*) => {
        &[$(FamilyRow { part_number: $pn, sheet: ZenerDatasheet {
            volts: $v, izt: $izt * 1e-3, zzt: $zzt, izk: $izk * 1e-3, zzk: $zzk } },)*]
    };
}

/// 1 W glass/plastic 1N47xxA family: Vz (V), Izt (mA), Zzt (ohm), Izk (mA), Zzk (ohm) maximum limits.
/// Typed from memory of the common industry datasheet table [memory]; rows 1N4733A, 1N4747A and 1N4749A are
/// the check values of docs/model.md section 4 and are verified by a test.
pub const FAMILY_1N47XXA: Family = Family {
    name: "1N47xxA (1 W)",
    power_rating_watts: 1.0,
    rows: rows![
        "1N4728A" 3.3 76.0 10.0 1.0 400.0;
        "1N4729A" 3.6 69.0 10.0 1.0 400.0;
        "1N4730A" 3.9 64.0 9.0 1.0 400.0;
        "1N4731A" 4.3 58.0 9.0 1.0 400.0;
        "1N4732A" 4.7 53.0 8.0 1.0 500.0;
        "1N4733A" 5.1 49.0 7.0 1.0 550.0;
        "1N4734A" 5.6 45.0 5.0 1.0 600.0;
        "1N4735A" 6.2 41.0 2.0 1.0 700.0;
        "1N4736A" 6.8 37.0 3.5 1.0 700.0;
        "1N4737A" 7.5 34.0 4.0 0.5 700.0;
        "1N4738A" 8.2 31.0 4.5 0.5 700.0;
        "1N4739A" 9.1 28.0 5.0 0.5 700.0;
        "1N4740A" 10.0 25.0 7.0 0.25 700.0;
        "1N4741A" 11.0 23.0 8.0 0.25 700.0;
        "1N4742A" 12.0 21.0 9.0 0.25 700.0;
        "1N4743A" 13.0 19.0 10.0 0.25 700.0;
        "1N4744A" 15.0 17.0 14.0 0.25 700.0;
        "1N4745A" 16.0 15.5 16.0 0.25 700.0;
        "1N4746A" 18.0 14.0 20.0 0.25 750.0;
        "1N4747A" 20.0 12.5 22.0 0.25 750.0;
        "1N4748A" 22.0 11.5 23.0 0.25 750.0;
        "1N4749A" 24.0 10.5 25.0 0.25 750.0;
        "1N4750A" 27.0 9.5 35.0 0.25 750.0;
        "1N4751A" 30.0 8.5 40.0 0.25 1000.0;
        "1N4752A" 33.0 7.5 45.0 0.25 1000.0;
        "1N4753A" 36.0 7.0 50.0 0.25 1000.0;
        "1N4754A" 39.0 6.5 60.0 0.25 1000.0;
        "1N4755A" 43.0 6.0 70.0 0.25 1500.0;
        "1N4756A" 47.0 5.5 80.0 0.25 1500.0;
        "1N4757A" 51.0 5.0 95.0 0.25 1500.0;
        "1N4758A" 56.0 4.5 110.0 0.25 2000.0;
        "1N4759A" 62.0 4.0 125.0 0.25 2000.0;
        "1N4760A" 68.0 3.7 150.0 0.25 2000.0;
        "1N4761A" 75.0 3.3 175.0 0.25 2000.0;
        "1N4762A" 82.0 3.0 200.0 0.25 3000.0;
        "1N4763A" 91.0 2.8 250.0 0.25 3000.0;
        "1N4764A" 100.0 2.5 350.0 0.25 3000.0;
    ],
};

/// 1/2 W glass (DO-35) 1N52xxB family, 1N5221B-1N5281B: Vz (V), Izt (mA), Zzt (ohm), Izk (mA), Zzk (ohm)
/// maximum limits. Typed from memory of the common industry datasheet table [memory]: confirm against a
/// datasheet before relying on a row. Izk is 0.25 mA for every row.
pub const FAMILY_1N52XXB: Family = Family {
    name: "1N52xxB (1/2 W)",
    power_rating_watts: 0.5,
    rows: rows![
        "1N5221B" 2.4 20.0 30.0 0.25 1200.0;
        "1N5222B" 2.5 20.0 30.0 0.25 1250.0;
        "1N5223B" 2.7 20.0 30.0 0.25 1300.0;
        "1N5224B" 2.8 20.0 30.0 0.25 1400.0;
        "1N5225B" 3.0 20.0 29.0 0.25 1600.0;
        "1N5226B" 3.3 20.0 28.0 0.25 1600.0;
        "1N5227B" 3.6 20.0 24.0 0.25 1700.0;
        "1N5228B" 3.9 20.0 23.0 0.25 1900.0;
        "1N5229B" 4.3 20.0 22.0 0.25 2000.0;
        "1N5230B" 4.7 20.0 19.0 0.25 1900.0;
        "1N5231B" 5.1 20.0 17.0 0.25 1600.0;
        "1N5232B" 5.6 20.0 11.0 0.25 1600.0;
        "1N5233B" 6.0 20.0 7.0 0.25 1600.0;
        "1N5234B" 6.2 20.0 7.0 0.25 1000.0;
        "1N5235B" 6.8 20.0 5.0 0.25 750.0;
        "1N5236B" 7.5 20.0 6.0 0.25 500.0;
        "1N5237B" 8.2 20.0 8.0 0.25 500.0;
        "1N5238B" 8.7 20.0 8.0 0.25 600.0;
        "1N5239B" 9.1 20.0 10.0 0.25 600.0;
        "1N5240B" 10.0 20.0 17.0 0.25 600.0;
        "1N5241B" 11.0 20.0 22.0 0.25 600.0;
        "1N5242B" 12.0 20.0 30.0 0.25 600.0;
        "1N5243B" 13.0 9.5 13.0 0.25 600.0;
        "1N5244B" 14.0 9.0 15.0 0.25 600.0;
        "1N5245B" 15.0 8.5 16.0 0.25 600.0;
        "1N5246B" 16.0 7.8 17.0 0.25 600.0;
        "1N5247B" 17.0 7.4 19.0 0.25 600.0;
        "1N5248B" 18.0 7.0 21.0 0.25 600.0;
        "1N5249B" 19.0 6.6 23.0 0.25 600.0;
        "1N5250B" 20.0 6.2 25.0 0.25 600.0;
        "1N5251B" 22.0 5.6 29.0 0.25 600.0;
        "1N5252B" 24.0 5.2 33.0 0.25 600.0;
        "1N5253B" 25.0 5.0 35.0 0.25 600.0;
        "1N5254B" 27.0 4.6 41.0 0.25 600.0;
        "1N5255B" 28.0 4.5 44.0 0.25 600.0;
        "1N5256B" 30.0 4.2 49.0 0.25 600.0;
        "1N5257B" 33.0 3.8 58.0 0.25 700.0;
        "1N5258B" 36.0 3.4 70.0 0.25 700.0;
        "1N5259B" 39.0 3.2 80.0 0.25 800.0;
        "1N5260B" 43.0 3.0 93.0 0.25 900.0;
        "1N5261B" 47.0 2.7 105.0 0.25 1000.0;
        "1N5262B" 51.0 2.5 125.0 0.25 1100.0;
        "1N5263B" 56.0 2.2 150.0 0.25 1300.0;
        "1N5264B" 60.0 2.1 170.0 0.25 1400.0;
        "1N5265B" 62.0 2.0 185.0 0.25 1400.0;
        "1N5266B" 68.0 1.8 230.0 0.25 1600.0;
        "1N5267B" 75.0 1.7 270.0 0.25 1700.0;
        "1N5268B" 82.0 1.5 330.0 0.25 2000.0;
        "1N5269B" 87.0 1.4 370.0 0.25 2200.0;
        "1N5270B" 91.0 1.4 400.0 0.25 2300.0;
        "1N5271B" 100.0 1.3 500.0 0.25 2600.0;
        "1N5272B" 110.0 1.1 750.0 0.25 3000.0;
        "1N5273B" 120.0 1.0 900.0 0.25 4000.0;
        "1N5274B" 130.0 0.95 1100.0 0.25 4500.0;
        "1N5275B" 140.0 0.9 1300.0 0.25 4500.0;
        "1N5276B" 150.0 0.85 1500.0 0.25 5000.0;
        "1N5277B" 160.0 0.8 1700.0 0.25 5500.0;
        "1N5278B" 170.0 0.74 1900.0 0.25 5500.0;
        "1N5279B" 180.0 0.68 2200.0 0.25 6000.0;
        "1N5280B" 190.0 0.66 2400.0 0.25 6500.0;
        "1N5281B" 200.0 0.65 2500.0 0.25 7000.0;
    ],
};

/// E24 preferred-number mantissas (IEC 60063).
pub const E24: [f64; 24] = [
    1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6,
    6.2, 6.8, 7.5, 8.2, 9.1,
];

/// E24 values (IEC 60063) from `low` to `high` inclusive.
pub fn e24_between(low: f64, high: f64) -> Vec<f64> {
    let mut out = Vec::new();
    let mut decade = 0.1;
    while decade <= high * 10.0 {
        for m in E24 {
            let v = ((m * decade) * 1000.0).round() / 1000.0;
            if v >= low - 1e-9 && v <= high + 1e-9 {
                out.push(v);
            }
        }
        decade *= 10.0;
    }
    out
}

/// Nearest E24 value (IEC 60063) to `volts`, measured on a log scale.
pub fn nearest_e24(volts: f64) -> f64 {
    let volts = volts.max(1e-3);
    let exponent = volts.log10().floor();
    let decade = 10f64.powf(exponent);
    let mut best = E24[0] * decade;
    for scale in [decade, decade * 10.0] {
        for m in E24 {
            let candidate = m * scale;
            if (candidate / volts).ln().abs() < (best / volts).ln().abs() {
                best = candidate;
            }
        }
    }
    (best * 1000.0).round() / 1000.0
}

impl Family {
    /// Exact row for a nominal voltage, if the family has one.
    pub fn row(&self, volts: f64) -> Option<&FamilyRow> {
        self.rows
            .iter()
            .find(|r| (r.sheet.volts - volts).abs() < 1e-6)
    }

    /// Datasheet figures for any voltage in the family's range: the row itself, or knee data interpolated on a
    /// log scale between the neighbouring rows (outside the range, the end row's data scaled to `volts`).
    pub fn sheet_for(&self, volts: f64) -> ZenerDatasheet {
        if let Some(row) = self.row(volts) {
            return row.sheet;
        }
        let rows = self.rows;
        let first = rows[0].sheet;
        let last = rows[rows.len() - 1].sheet;
        if volts <= first.volts {
            return ZenerDatasheet { volts, ..first };
        }
        if volts >= last.volts {
            return ZenerDatasheet { volts, ..last };
        }
        let upper = rows
            .iter()
            .position(|r| r.sheet.volts > volts)
            .unwrap_or(rows.len() - 1);
        let (a, b) = (rows[upper - 1].sheet, rows[upper].sheet);
        let t = (volts / a.volts).ln() / (b.volts / a.volts).ln();
        let lerp = |x: f64, y: f64| (x.ln() + t * (y.ln() - x.ln())).exp();
        ZenerDatasheet {
            volts,
            izt: lerp(a.izt, b.izt),
            zzt: lerp(a.zzt, b.zzt),
            izk: lerp(a.izk, b.izk),
            zzk: lerp(a.zzk, b.zzk),
        }
    }

    /// Part number of the row at `volts`, if any.
    pub fn part_number(&self, volts: f64) -> Option<&'static str> {
        self.row(volts).map(|r| r.part_number)
    }
}

/// How a part's rating compares with the load it carries.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MarginState {
    /// The rating is at least twice the load.
    Ok,
    /// The rating covers the load, but by less than twice.
    Thin,
    /// The load exceeds the rating.
    Over,
}

impl MarginState {
    /// "ok", "thin" or "over", as the command line and the plugin print it.
    pub fn label(self) -> &'static str {
        match self {
            MarginState::Ok => "ok",
            MarginState::Thin => "thin",
            MarginState::Over => "over",
        }
    }
}

/// Margin of a part: its power rating over the average power it dissipates (a ratio, printed as "12.0x").
/// Average (not peak) power sets a glass Zener's junction temperature: its thermal time constant (around a
/// second) is far longer than an audio cycle. No load at all gives an infinite margin.
pub fn margin(rating_watts: f64, average_watts: f64) -> f64 {
    if average_watts > 0.0 {
        rating_watts / average_watts
    } else {
        f64::INFINITY
    }
}

/// The state of a margin: ok at 2x or more, thin from 1x to 2x, over below 1x (common practice, no single
/// source: the 2x covers the derating of glass Zener ratings above about 50 C lead temperature and a hot
/// chassis). A margin that is not a number counts as over.
pub fn margin_state(margin: f64) -> MarginState {
    if margin >= 2.0 {
        MarginState::Ok
    } else if margin >= 1.0 {
        MarginState::Thin
    } else {
        MarginState::Over
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn margin_states_follow_the_2x_rule() {
        // rating / load: 1 W over 0.1 W is 10x (ok), over 0.6 W 1.67x (thin), over 1.5 W 0.67x (over).
        assert_eq!(margin(1.0, 0.1), 10.0);
        assert_eq!(margin_state(margin(1.0, 0.1)), MarginState::Ok);
        assert_eq!(margin_state(margin(1.0, 0.6)), MarginState::Thin);
        assert_eq!(margin_state(margin(1.0, 1.5)), MarginState::Over);
        assert_eq!(margin_state(2.0), MarginState::Ok);
        assert_eq!(margin_state(1.0), MarginState::Thin);
        assert_eq!(margin_state(f64::NAN), MarginState::Over);
        assert_eq!(margin(0.5, 0.0), f64::INFINITY);
        assert_eq!(margin_state(margin(0.5, 0.0)), MarginState::Ok);
    }

    #[test]
    fn e24_series_has_24_values_a_decade() {
        assert_eq!(e24_between(10.0, 91.0).len(), 24);
        assert_eq!(nearest_e24(19.3), 20.0);
        assert_eq!(nearest_e24(5.5), 5.6);
    }

    #[test]
    fn half_watt_family_rows_are_ordered_and_fit() {
        // Table typed from memory [memory]; check its shape: rising voltages, izk below izt, zzk above zzt,
        // and a finite positive fit of docs/model.md section 4 for every row.
        let rows = FAMILY_1N52XXB.rows;
        assert_eq!(rows.len(), 61);
        for w in rows.windows(2) {
            assert!(w[1].sheet.volts > w[0].sheet.volts);
        }
        for r in rows {
            assert!(
                r.sheet.izk < r.sheet.izt && r.sheet.zzk > r.sheet.zzt,
                "{}",
                r.part_number
            );
            let z = crate::devices::Zener::fit(&r.sheet);
            assert!(
                z.nbv > 0.0 && z.rs >= 0.0 && z.nbv.is_finite(),
                "{}",
                r.part_number
            );
        }
    }
}
