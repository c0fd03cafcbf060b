//! The automatic method: explicit until the problem proves stiff, then
//! implicit for the rest of the segment. It holds one stepper of each kind
//! and decides which takes the next attempt.
//!
//! The stiffness test is that of Hairer, Nørsett & Wanner (Solving ODEs I,
//! section II.10): after each accepted explicit step, h |lambda| estimated
//! from the last two stages; above 3.25 on 15 accepted steps (6 non-stiff
//! steps in a row reset the count) means stiff. It never switches back
//! within a segment, and each segment starts explicit.

use super::dopri::Dopri;
use super::sdirk::Sdirk;
use super::{Attempt, Control, Dense, Failure, Stats, Stepper, System};

/// h |lambda| above which an accepted explicit step counts as stiff.
const STIFF_H_LAMBDA: f64 = 3.25;
/// Stiff steps that make the switch.
const STIFF_STEPS: u32 = 15;
/// Non-stiff steps in a row that forget the stiff ones.
const NONSTIFF_RESET: u32 = 6;

pub struct Auto {
    explicit: Dopri,
    implicit: Sdirk,
    /// The next attempt is implicit.
    switched: bool,
    /// The last accepted step was implicit (its interpolant is the implicit one).
    last_implicit: bool,
    stiff_count: u32,
    nonstiff_count: u32,
}

impl Stepper for Auto {
    fn new(n: usize) -> Auto {
        Auto {
            explicit: Dopri::new(n),
            implicit: Sdirk::new(n),
            switched: false,
            last_implicit: false,
            stiff_count: 0,
            nonstiff_count: 0,
        }
    }

    fn implicit(&self) -> bool {
        self.switched
    }

    fn attempt<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        f0: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> Result<Attempt, Failure> {
        if self.switched {
            let a = self.implicit.attempt(sys, t, h, y, f0, ctl, stats)?;
            if a.accepted {
                self.last_implicit = true;
            }
            return Ok(a);
        }
        let a = self.explicit.attempt(sys, t, h, y, f0, ctl, stats)?;
        if a.accepted {
            self.last_implicit = false;
            match self.explicit.stiffness(h, ctl.n_err) {
                Some(hl) if hl > STIFF_H_LAMBDA => {
                    self.nonstiff_count = 0;
                    self.stiff_count += 1;
                    if self.stiff_count >= STIFF_STEPS {
                        self.switched = true;
                        stats.switched_at.get_or_insert(t + h);
                    }
                }
                _ => {
                    self.nonstiff_count += 1;
                    if self.nonstiff_count >= NONSTIFF_RESET {
                        self.stiff_count = 0;
                    }
                }
            }
        }
        Ok(a)
    }

    fn y1(&self) -> &[f64] {
        if self.last_implicit {
            self.implicit.y1()
        } else {
            self.explicit.y1()
        }
    }

    fn f1(&self) -> &[f64] {
        if self.last_implicit {
            self.implicit.f1()
        } else {
            self.explicit.f1()
        }
    }

    fn dense<'a>(&'a self, t0: f64, h: f64, y0: &'a [f64], f0: &'a [f64]) -> Dense<'a> {
        if self.last_implicit {
            self.implicit.dense(t0, h, y0, f0)
        } else {
            self.explicit.dense(t0, h, y0, f0)
        }
    }
}
