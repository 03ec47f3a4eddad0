//! The invented world: a video streaming service ("Glimmerreel") with invented titles,
//! genres, devices and plans, and customers whose lives are drawn from a seed.
//!
//! Planted behaviour: engagement fades in the weeks before a customer cancels, and customers
//! who watch little are more likely to cancel; some customers resume after ending.

use crate::rng::{mix, Stream};

/// Plans: name and monthly fee.
pub const PLANS: &[(&str, f64)] = &[("solo", 6.49), ("duo", 9.99), ("household", 14.49)];
/// Device classes.
pub const DEVICES: &[&str] = &["phone", "tablet", "tv", "web", "console"];
/// Genres with a typical runtime in minutes.
pub const GENRES: &[(&str, f64)] = &[
    ("drama", 52.0),
    ("comedy", 28.0),
    ("documentary", 48.0),
    ("thriller", 58.0),
    ("kids", 22.0),
    ("science_fiction", 61.0),
    ("romance", 95.0),
    ("reality", 41.0),
];
/// Support channels.
pub const CHANNELS: &[&str] = &["chat", "email", "phone"];
/// Support topics.
pub const TOPICS: &[&str] = &["billing", "playback", "account", "content"];
/// Titles per genre in the catalogue.
pub const TITLES_PER_GENRE: u64 = 120;

/// Device mixes ("personas"): weights over [`DEVICES`].
const DEVICE_MIXES: &[[f64; 5]] = &[
    [0.70, 0.10, 0.10, 0.08, 0.02],
    [0.15, 0.10, 0.65, 0.05, 0.05],
    [0.25, 0.35, 0.20, 0.15, 0.05],
    [0.10, 0.05, 0.35, 0.10, 0.40],
    [0.30, 0.05, 0.15, 0.50, 0.00],
];

/// No day (for an open end).
pub const NEVER: i32 = i32::MAX;

/// One subscription spell: from start until it ends (or never, within the world).
#[derive(Debug, Clone, Copy)]
pub struct Spell {
    /// First day (relative to the world's start).
    pub start: i32,
    /// Day the customer cancelled (still served until `end`), or [`NEVER`].
    pub cancel: i32,
    /// Day the subscription ended, or [`NEVER`].
    pub end: i32,
    /// Ended by failed payments rather than a cancellation.
    pub involuntary: bool,
    /// Day engagement starts to fade before the cancellation.
    pub fade_start: i32,
}

/// A customer's drawn life.
#[derive(Debug, Clone)]
pub struct Customer {
    /// Index in the world (0-based).
    pub index: u32,
    /// Up to three spells.
    pub spells: Vec<Spell>,
    /// Plan index at start.
    pub plan: u8,
    /// Day of a plan change and the new plan, if any.
    pub plan_change: Option<(i32, u8)>,
    /// Mean plays per active day at full engagement.
    pub engagement: f64,
    /// Device mix.
    pub device_mix: u8,
    /// Two favourite genres.
    pub genres: [u8; 2],
    /// Second of the day at which billing changes happen.
    pub billing_second: u32,
}

/// The pseudonymous key of customer `index`: a scrambled, fixed-width hex id.
///
/// The scramble is a bijection on 32-bit numbers (xor, odd multiply, xor-shift), so keys
/// never collide.
pub fn customer_key(seed: u64, index: u32) -> String {
    let mut x = index ^ (mix(seed) as u32);
    x = x.wrapping_mul(0x9E37_79B1);
    x ^= x >> 15;
    x = x.wrapping_mul(0x85EB_CA77);
    x ^= x >> 13;
    format!("cu{x:08x}")
}

/// Title id for (genre, number).
pub fn title_id(genre: usize, n: u64) -> String {
    format!("t{genre}{n:03}")
}

impl Customer {
    /// Draws customer `index` of a world of `days` days.
    pub fn draw(seed: u64, index: u32, days: i32) -> Customer {
        let mut r = Stream::new(seed, &[1, index as u64]);
        let start = if r.chance(0.4) {
            -(1 + r.below(540) as i32)
        } else {
            r.below(days.max(1) as u64) as i32
        };
        let engagement = (1.2f64.ln() + 0.6 * r.normal()).exp().clamp(0.05, 12.0);
        let plan = r.pick(&[0.35, 0.45, 0.20]) as u8;
        let device_mix = r.below(DEVICE_MIXES.len() as u64) as u8;
        let g0 = r.below(GENRES.len() as u64) as u8;
        let g1 = r.below(GENRES.len() as u64) as u8;
        let billing_second = r.below(86_400) as u32;
        // Monthly chance of leaving: higher for light viewers and the cheapest plan.
        let hazard = 0.025 + 0.09 / (1.0 + engagement) + if plan == 0 { 0.02 } else { 0.0 };
        let mut spells = Vec::new();
        let mut s = start;
        while spells.len() < 3 {
            let mut spell = Spell {
                start: s,
                cancel: NEVER,
                end: NEVER,
                involuntary: false,
                fade_start: NEVER,
            };
            let mut cycle = 0;
            loop {
                let cycle_start = s + 30 * cycle;
                if cycle_start > days + 120 {
                    break;
                }
                if cycle > 0 || r.chance(0.5) {
                    // (A first cycle is a trial: half the leavers in it are not counted twice.)
                    if r.chance(hazard) {
                        if r.chance(0.25) {
                            spell.involuntary = true;
                            spell.end = cycle_start + 30 + 7;
                            spell.fade_start = cycle_start + 30;
                        } else {
                            spell.cancel = cycle_start + r.below(29) as i32;
                            spell.end = cycle_start + 30;
                            spell.fade_start = spell.cancel - 14 - r.below(22) as i32;
                        }
                        break;
                    }
                }
                cycle += 1;
            }
            let ended = spell.end;
            spells.push(spell);
            if ended == NEVER || !r.chance(0.25) {
                break;
            }
            // Some leavers come back: a few within days, most after weeks.
            s = ended + 1 + r.exponential(12.0) as i32;
        }
        let plan_change = if r.chance(0.15) {
            let first = spells[0];
            let last_day = first.cancel.min(first.end).min(days + 120);
            let span = (last_day - first.start - 2).max(1) as u64;
            let day = first.start + 1 + r.below(span) as i32;
            let new_plan = ((plan as u64 + 1 + r.below(2)) % 3) as u8;
            Some((day, new_plan))
        } else {
            None
        };
        Customer {
            index,
            spells,
            plan,
            plan_change,
            engagement,
            device_mix,
            genres: [g0, g1],
            billing_second,
        }
    }

    /// The spell that covers `day` (subscribed: started and not yet ended), if any.
    pub fn spell_on(&self, day: i32) -> Option<&Spell> {
        self.spells.iter().find(|s| s.start <= day && day < s.end)
    }

    /// The plan in force on `day`.
    pub fn plan_on(&self, day: i32) -> u8 {
        match self.plan_change {
            Some((d, p)) if day >= d => p,
            _ => self.plan,
        }
    }

    /// Multiplier of engagement on `day` of spell `s`: fades before a cancellation.
    pub fn fade(&self, s: &Spell, day: i32) -> f64 {
        let new_customer = if day - s.start < 7 { 1.3 } else { 1.0 };
        let f = if s.involuntary {
            if day >= s.fade_start {
                0.6
            } else {
                1.0
            }
        } else if day >= s.cancel {
            0.12
        } else if day >= s.fade_start {
            let span = (s.cancel - s.fade_start).max(1) as f64;
            1.0 - 0.75 * (day - s.fade_start) as f64 / span
        } else {
            1.0
        };
        f * new_customer
    }

    /// Device weights.
    pub fn device_weights(&self) -> &'static [f64; 5] {
        &DEVICE_MIXES[self.device_mix as usize]
    }
}

/// Local hour weights for viewing: evening peak, small lunchtime bump.
pub const VIEW_HOURS: [f64; 24] = [
    2.0, 1.0, 0.5, 0.3, 0.2, 0.2, 0.4, 0.8, 1.0, 1.0, 1.1, 1.3, 1.8, 1.6, 1.2, 1.2, 1.5, 2.2, 3.2,
    4.6, 5.5, 5.2, 4.0, 3.0,
];
