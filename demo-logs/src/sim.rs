//! The invented drive module: latent operating state, physics-flavoured
//! feature model, sensor noise and the drift/fault injections.
//!
//! Latent drivers shared by many features: ground speed, longitudinal
//! acceleration, yaw rate, towed payload, floor roughness and grade, and the
//! thermal states of windings, gearbox and driver. Everything a feature shows is a
//! function of those plus independent sensor noise, which is what gives the
//! logs their low-dimensional structure.

use crate::features::{idx::*, N};
use crate::rng::{derive_seed, Rng};

/// Sample period in seconds (10 Hz windows).
pub(crate) const DT: f64 = 0.1;

const G: f64 = 9.81;
/// Distance between the two drive wheels (m).
const TRACK: f64 = 0.52;
/// Tugger mass including battery (kg).
const BASE_MASS: f64 = 260.0;
/// Heaviest cart it tows (kg).
const MAX_PAYLOAD: f64 = 500.0;
/// Jerk limit of the speed controller (m/s^3).
const JERK_MAX: f64 = 1.2;
/// Motor current per newton of wheel force (gear ratio, wheel radius, torque
/// constant and efficiency folded together).
const AMP_PER_NEWTON: f64 = 0.028;
/// Back-EMF seen at the bridge per m/s of wheel speed (V).
const VOLT_PER_MPS: f64 = 14.0;
/// Set point and droop of the regulated drive bus supply.
const BUS_NOMINAL_V: f64 = 48.0;
const BUS_DROOP_OHM: f64 = 0.12;
const RAD2DEG: f64 = 180.0 / std::f64::consts::PI;

/// Seed-derivation tags, one per independent random stream.
const TAG_ROBOT: u64 = 0x0001;
const TAG_DAY: u64 = 0x0002;
const TAG_PROCESS: u64 = 0x0003;
const TAG_SENSOR: u64 = 0x0004;
const TAG_DRIFT: u64 = 0x0005;

/// Operating mode of the tugger.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Mode {
    Idle,
    Accelerating,
    Cruising,
    Towing,
    Braking,
}

/// What happens to a log from its onset row on.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Drift {
    None,
    BearingWear,
    GainChange,
    LooseMount,
    NewFloor,
    SensorDropout,
}

/// Per-robot constants: unit-to-unit spread, all within the nominal range.
#[derive(Clone, Debug)]
pub(crate) struct Robot {
    r_wind: [f64; 2],
    i_offset: [f64; 2],
    wheel_scale: [f64; 2],
    rth_wind: [f64; 2],
    rth_gear: f64,
    friction: f64,
    vib_gain: [f64; 6],
    imu_gain: f64,
    tilt_offset: f64,
    v_offset: f64,
    aux_current: f64,
}

fn sym(r: &mut Rng, spread: f64) -> f64 {
    spread * (2.0 * r.uniform() - 1.0)
}

impl Robot {
    pub(crate) fn new(seed: u64, robot: u32) -> Self {
        let mut r = Rng::new(derive_seed(seed, &[TAG_ROBOT, u64::from(robot)]));
        let r_wind = [
            0.30 * (1.0 + sym(&mut r, 0.03)),
            0.30 * (1.0 + sym(&mut r, 0.03)),
        ];
        let i_offset = [sym(&mut r, 0.015), sym(&mut r, 0.015)];
        let wheel_scale = [1.0 + sym(&mut r, 0.004), 1.0 + sym(&mut r, 0.004)];
        let rth_wind = [
            2.5 * (1.0 + sym(&mut r, 0.03)),
            2.5 * (1.0 + sym(&mut r, 0.03)),
        ];
        let rth_gear = 2.2 * (1.0 + sym(&mut r, 0.03));
        let friction = 1.0 + sym(&mut r, 0.05);
        let mut vib_gain = [0.0; 6];
        for g in &mut vib_gain {
            *g = 1.0 + sym(&mut r, 0.08);
        }
        let imu_gain = 1.0 + sym(&mut r, 0.03);
        let tilt_offset = sym(&mut r, 0.25);
        let v_offset = sym(&mut r, 0.06);
        let aux_current = 1.6 + sym(&mut r, 0.1);
        Robot {
            r_wind,
            i_offset,
            wheel_scale,
            rth_wind,
            rth_gear,
            friction,
            vib_gain,
            imu_gain,
            tilt_offset,
            v_offset,
            aux_current,
        }
    }
}

/// Per-day conditions, shared by every robot on that day.
#[derive(Clone, Debug)]
pub(crate) struct Day {
    t_amb0: f64,
    floor_base: f64,
}

impl Day {
    pub(crate) fn new(seed: u64, day: u32) -> Self {
        let mut r = Rng::new(derive_seed(seed, &[TAG_DAY, u64::from(day)]));
        Day {
            t_amb0: r.range(20.7, 21.3),
            floor_base: r.range(0.9, 1.1),
        }
    }
}

/// One log's simulator. Call [`Sim::step`] once per row.
pub(crate) struct Sim {
    robot: Robot,
    day: Day,
    process: Rng,
    sensor: Rng,
    drift_rng: Rng,
    drift: Drift,
    /// Factor on the left motor current's reading under [`Drift::GainChange`].
    gain_change: f64,
    onset: usize,
    rows: usize,
    row: usize,
    mode: Mode,
    mode_time: f64,
    dwell: f64,
    loaded: bool,
    payload: f64,
    v_set: f64,
    v: f64,
    a: f64,
    a_dist: f64,
    omega: f64,
    heading: f64,
    heading_cmd: f64,
    rough: f64,
    grade: f64,
    v_bus: f64,
    t_wind: [f64; 2],
    t_gear: f64,
    t_drv: f64,
    amb_dev: f64,
    drop_left: usize,
    gap_left: usize,
}

impl Sim {
    /// A log of `rows` rows for `robot` on `day`. The nominal trajectory only
    /// depends on `(seed, robot, day)`: the same log with a drift is identical
    /// to the nominal one before `onset`.
    pub(crate) fn new(
        seed: u64,
        robot: u32,
        day: u32,
        rows: usize,
        drift: Drift,
        onset: usize,
    ) -> Self {
        let path = |tag| [tag, u64::from(robot), u64::from(day)];
        let mut process = Rng::new(derive_seed(seed, &path(TAG_PROCESS)));
        let sensor = Rng::new(derive_seed(seed, &path(TAG_SENSOR)));
        let drift_rng = Rng::new(derive_seed(seed, &path(TAG_DRIFT)));
        let robot = Robot::new(seed, robot);
        let day = Day::new(seed, day);
        let loaded = process.uniform() < 0.4;
        let payload = if loaded {
            process.range(200.0, MAX_PAYLOAD)
        } else {
            0.0
        };
        // The robot has been working before the log starts: its thermal
        // states are near their working equilibrium.
        let warm = process.range(-1.5, 1.5);
        let t_wind = [
            day.t_amb0 + 7.5 + warm + process.range(-0.5, 0.5),
            day.t_amb0 + 7.5 + warm + process.range(-0.5, 0.5),
        ];
        let t_gear = day.t_amb0 + 13.0 + process.range(-1.5, 1.5);
        let t_drv = day.t_amb0 + 13.0 + process.range(-1.0, 1.0);
        let amb_dev = 0.25 * process.normal();
        let rough = day.floor_base + 0.1 * process.normal();
        let grade = 0.002 * process.normal();
        let mut sim = Sim {
            robot,
            day,
            process,
            sensor,
            drift_rng,
            drift,
            gain_change: 1.04,
            onset,
            rows,
            row: 0,
            mode: Mode::Idle,
            mode_time: 0.0,
            dwell: 0.0,
            loaded,
            payload,
            v_set: 0.0,
            v: 0.0,
            a: 0.0,
            a_dist: 0.0,
            omega: 0.0,
            heading: 0.0,
            heading_cmd: 0.0,
            rough,
            grade,
            v_bus: BUS_NOMINAL_V,
            t_wind,
            t_gear,
            t_drv,
            amb_dev,
            drop_left: 0,
            gap_left: 0,
        };
        // Start somewhere inside an idle period.
        sim.dwell = sim.sample_dwell(Mode::Idle) * sim.process.uniform();
        sim
    }

    /// Sets the factor [`Drift::GainChange`] multiplies the left motor
    /// current's reading by from the onset on (1.04 unless set). Draws no
    /// random number: the log is otherwise the same.
    pub(crate) fn set_gain_change(&mut self, factor: f64) {
        self.gain_change = factor;
    }

    fn sample_dwell(&mut self, mode: Mode) -> f64 {
        let p = &mut self.process;
        match mode {
            Mode::Idle => (12.0 * p.lognormal(0.6)).clamp(3.0, 60.0),
            Mode::Cruising => (25.0 * p.lognormal(0.6)).clamp(4.0, 100.0),
            Mode::Towing => (35.0 * p.lognormal(0.5)).clamp(8.0, 120.0),
            // Ended by the speed reaching its target, not by a clock.
            Mode::Accelerating | Mode::Braking => f64::INFINITY,
        }
    }

    fn enter(&mut self, mode: Mode) {
        self.mode = mode;
        self.mode_time = 0.0;
        self.dwell = self.sample_dwell(mode);
    }

    fn cruise_target(&mut self) -> f64 {
        if self.loaded {
            self.process.range(0.8, 1.3)
        } else {
            self.process.range(1.3, 1.9)
        }
    }

    /// Semi-Markov mode logic: dwell times for the steady modes, physical end
    /// conditions for the transients.
    fn update_mode(&mut self) {
        self.mode_time += DT;
        match self.mode {
            Mode::Idle => {
                if self.mode_time >= self.dwell {
                    // At a station: hitch or drop a cart, then drive off.
                    let u = self.process.uniform();
                    if self.loaded && u < 0.7 {
                        self.loaded = false;
                        self.payload = 0.0;
                    } else if !self.loaded && u < 0.6 {
                        self.loaded = true;
                        self.payload = self.process.range(200.0, MAX_PAYLOAD);
                    }
                    self.v_set = self.cruise_target();
                    self.enter(Mode::Accelerating);
                }
            }
            Mode::Accelerating => {
                if self.v >= self.v_set - 0.04 || self.mode_time > 15.0 {
                    let next = if self.loaded {
                        Mode::Towing
                    } else {
                        Mode::Cruising
                    };
                    self.enter(next);
                }
            }
            Mode::Cruising | Mode::Towing => {
                if self.mode_time >= self.dwell {
                    if self.process.uniform() < 0.3 {
                        // Speed change along the aisle.
                        self.v_set = self.cruise_target();
                        if self.v_set > self.v + 0.15 {
                            self.enter(Mode::Accelerating);
                        } else {
                            let m = self.mode;
                            self.enter(m);
                        }
                    } else {
                        self.enter(Mode::Braking);
                    }
                }
            }
            Mode::Braking => {
                if self.v <= 0.0 {
                    self.enter(Mode::Idle);
                }
            }
        }
    }

    /// Advances one window and writes its feature vector (NaN = no reading).
    pub(crate) fn step(&mut self, out: &mut [f64; N]) -> Mode {
        let active = self.drift != Drift::None && self.row >= self.onset;
        let ramp = if active {
            (self.row - self.onset) as f64 / (self.rows.saturating_sub(self.onset)).max(1) as f64
        } else {
            0.0
        };
        self.update_mode();
        let mode = self.mode;
        let lf = self.payload / MAX_PAYLOAD;
        let mass = BASE_MASS + self.payload;

        // ---- longitudinal motion -------------------------------------
        let p = &mut self.process;
        self.a_dist += -self.a_dist * DT / 2.0 + 0.05 * DT.sqrt() * p.normal();
        let a_des = match mode {
            Mode::Idle => 0.0,
            Mode::Accelerating => {
                let a_max = if self.loaded { 0.35 } else { 0.6 };
                (1.5 * (self.v_set - self.v)).clamp(0.0, a_max)
            }
            Mode::Cruising | Mode::Towing => {
                (0.8 * (self.v_set - self.v) + self.a_dist).clamp(-0.4, 0.4)
            }
            Mode::Braking => {
                let b_max: f64 = if self.loaded { 0.45 } else { 0.7 };
                -b_max.min(1.5 * self.v + 0.08)
            }
        };
        let a_prev = self.a;
        self.a += (a_des - self.a).clamp(-JERK_MAX * DT, JERK_MAX * DT);
        self.v += self.a * DT;
        if self.v <= 0.0 || mode == Mode::Idle {
            self.v = 0.0;
            self.a = 0.0;
        }
        let v = self.v;
        let a = self.a;

        // ---- heading ---------------------------------------------------
        // The heading demand wanders around the aisle direction (lane
        // changes, weaving round obstacles: an OU process, frozen while
        // parked); the chassis follows it as a damped second-order system.
        // Heading stays bounded, so the yaw rate averages out over minutes.
        let sigma_psi = match mode {
            Mode::Idle => 0.0,
            Mode::Accelerating | Mode::Braking => 0.08,
            Mode::Cruising => 0.35,
            Mode::Towing => 0.18,
        };
        let omega_prev = self.omega;
        let tau_cmd = 4.0;
        let n_psi = p.normal();
        if mode != Mode::Idle {
            self.heading_cmd +=
                -self.heading_cmd * DT / tau_cmd + sigma_psi * (2.0 * DT / tau_cmd).sqrt() * n_psi;
        }
        let w_lim = 0.45 * v;
        let omega_des = (self.heading_cmd - self.heading) / 1.2;
        self.omega += (omega_des - self.omega) * DT / 0.8;
        self.omega = self.omega.clamp(-w_lim, w_lim);
        self.heading += self.omega * DT;
        let omega = self.omega;
        let omega_dot = (omega - omega_prev) / DT;

        // ---- floor under the wheels (changes with distance travelled) ---
        let ds = v * DT;
        self.rough += (self.day.floor_base - self.rough) * ds / 40.0
            + 0.15 * (2.0 * ds / 40.0).sqrt() * p.normal();
        self.rough = self.rough.clamp(0.5, 1.8);
        self.grade += -self.grade * ds / 8.0 + 0.002 * (2.0 * ds / 8.0).sqrt() * p.normal();
        let rho = self.rough;

        // ---- forces and currents ----------------------------------------
        let moving = v > 0.0;
        let f_roll = if moving {
            mass * G * 0.015 * self.robot.friction * (0.85 + 0.15 * rho)
        } else {
            0.0
        };
        let f_grade = if moving { mass * G * self.grade } else { 0.0 };
        let f = 1.08 * mass * a + f_roll + f_grade;
        let torque_yaw = mass * (0.04 * omega_dot + 0.02 * omega);
        let fw = [f / 2.0 - torque_yaw / TRACK, f / 2.0 + torque_yaw / TRACK];
        let vw = [v - omega * TRACK / 2.0, v + omega * TRACK / 2.0];
        let mut cur = [0.0; 2];
        let mut duty = [0.0; 2];
        let mut p_bus = 0.0;
        let mut p_cu = [0.0; 2];
        let mut p_mech_abs = 0.0;
        for s in 0..2 {
            cur[s] = if moving {
                0.45 + 0.5 * vw[s].abs() + AMP_PER_NEWTON * fw[s].abs()
            } else {
                0.22
            };
            let r = self.robot.r_wind[s] * (1.0 + 0.00393 * (self.t_wind[s] - 20.0));
            p_cu[s] = cur[s] * cur[s] * r;
            let p_mech = fw[s] * vw[s];
            p_mech_abs += p_mech.abs();
            let sign = if p_mech >= 0.0 { 1.0 } else { -1.0 };
            duty[s] = if moving {
                ((VOLT_PER_MPS * vw[s].abs() + sign * cur[s] * r) / self.v_bus).clamp(0.0, 0.98)
            } else {
                0.01
            };
            let p_el = if p_mech >= 0.0 {
                p_mech / 0.88
            } else {
                p_mech * 0.75
            };
            p_bus += p_el + p_cu[s] + 1.2 * vw[s].abs();
        }
        let i_bus = p_bus / self.v_bus + self.robot.aux_current;
        // The drive bus is fed by a regulated supply with droop.
        self.v_bus = BUS_NOMINAL_V - BUS_DROOP_OHM * i_bus;

        // ---- thermal -----------------------------------------------------
        // Hall temperature wanders slowly around the day's mean.
        self.amb_dev +=
            -self.amb_dev * DT / 900.0 + 0.25 * (2.0 * DT / 900.0).sqrt() * self.process.normal();
        let t_amb = self.day.t_amb0 + self.amb_dev;
        for s in 0..2 {
            let p_loss = p_cu[s] + 1.2 * vw[s].abs();
            let target = t_amb + self.robot.rth_wind[s] * p_loss;
            self.t_wind[s] += (target - self.t_wind[s]) * DT / 60.0;
        }
        let mut p_gear = 0.04 * p_mech_abs + 2.5 * v;
        if active && self.drift == Drift::BearingWear {
            p_gear += 1.0 * ramp * (0.3 + v);
        }
        self.t_gear += (t_amb + self.robot.rth_gear * p_gear - self.t_gear) * DT / 200.0;
        let p_drv = 1.0 + 0.8 * (cur[0] + cur[1]) + 0.02 * (cur[0] * cur[0] + cur[1] * cur[1]);
        self.t_drv += (t_amb + 3.2 * p_drv - self.t_drv) * DT / 60.0;

        // ---- vibration and IMU (true window statistics) -----------------
        let v2 = v * v;
        let rv2 = rho * rho * v2;
        let torque_n = (fw[0].abs() + fw[1].abs()) / 100.0;
        let new_floor = active && self.drift == Drift::NewFloor;
        let mut vib = [
            2.0e-4 + 0.010 * rv2 + 0.004 * a.abs(),
            1.5e-4 + 0.005 * rho * v2 + 0.002 * rho * v,
            1.0e-4 + 0.012 * v2 * (1.0 + 0.8 * torque_n),
            0.8e-4 + 0.005 * v * (1.0 + 1.5 * torque_n),
            0.5e-4 + 0.0015 * v * (1.0 + 0.3 * lf),
            0.4e-4 + 0.00004 * (cur[0] + cur[1]) + 0.0008 * v,
        ];
        let mut az2 = 0.025 * 0.025 + 0.030 * rv2 * (1.0 - 0.3 * lf) + 0.002 * v;
        let jerk_true = (a - a_prev) / DT;
        let mut jerk2 = jerk_true * jerk_true + 0.02 * 0.02 + 0.5 * rv2;
        if new_floor {
            // Ribbed steel plates: smooth between seams, sharp seam impacts.
            vib[0] = 2.0e-4 + 0.004 * v2 + 0.004 * a.abs();
            vib[1] = 1.5e-4 + 0.030 * v2;
            vib[2] += 0.004 * v2;
            az2 = 0.025 * 0.025 + 0.090 * v2 + 0.002 * v;
            jerk2 = jerk_true * jerk_true + 0.02 * 0.02 + 2.0 * v2;
        }
        if active && self.drift == Drift::BearingWear {
            vib[4] += 0.006 * ramp * (0.05 + v);
            vib[5] += 0.003 * ramp * (0.05 + v);
        }
        let mut ax2 = a * a + 0.02 * 0.02 + 0.012 * rv2;
        let mut ay2 = (v * omega) * (v * omega) + 0.015 * 0.015 + 0.008 * rv2;
        let gyro2 =
            (omega * RAD2DEG) * (omega * RAD2DEG) + 0.08 * 0.08 + (0.9 * rho * v) * (0.9 * rho * v);
        let tilt = self.grade * RAD2DEG - 0.9 * a + 0.0012 * self.payload + self.robot.tilt_offset;
        if active && self.drift == Drift::LooseMount {
            // The sensor pod rattles on its bracket: irregular impacts.
            let d = &mut self.drift_rng;
            let rattle = (0.03 + 0.10 * v) * d.lognormal(0.35);
            ax2 = 1.69 * ax2 + 0.64 * rattle * rattle;
            ay2 = 1.69 * ay2 + 0.64 * rattle * rattle;
            az2 = 1.69 * az2 + rattle * rattle;
            jerk2 = 1.69 * jerk2 + 36.0 * rattle * rattle;
            let e = (0.0004 + 0.002 * v) * d.lognormal(0.4);
            for (k, w) in [(2usize, 1.0), (3, 0.8), (4, 0.6), (5, 0.5)] {
                vib[k] += w * e * d.lognormal(0.2);
            }
        }

        // ---- sensors --------------------------------------------------------
        let s = &mut self.sensor;
        let rb = &self.robot;
        for k in 0..2 {
            let i = cur[k] * (1.0 + 0.01 * s.normal()) + 0.015 * s.normal() + rb.i_offset[k];
            out[I_L + k] = i.max(0.0);
            out[W_L + k] =
                vw[k] * rb.wheel_scale[k] * (1.0 + 0.002 * s.normal()) + 0.002 * s.normal();
            out[D_L + k] = (duty[k] + 0.002 * s.normal()).clamp(0.0, 1.0);
            out[TW_L + k] = self.t_wind[k] + 0.03 * s.normal();
        }
        out[VBUS] = self.v_bus + rb.v_offset + 0.01 * s.normal();
        out[IBUS] = i_bus + 0.03 * s.normal();
        out[T_GB] = self.t_gear + 0.03 * s.normal();
        out[T_DRV] = self.t_drv + 0.03 * s.normal();
        for k in 0..6 {
            out[VB1 + k] = rb.vib_gain[k] * vib[k] * s.lognormal(0.10);
        }
        let imu = rb.imu_gain;
        out[AX] = imu * ax2.sqrt() * s.lognormal(0.05);
        out[AY] = imu * ay2.sqrt() * s.lognormal(0.05);
        out[AZ] = imu * az2.sqrt() * s.lognormal(0.05);
        out[GYRO] = gyro2.sqrt() * s.lognormal(0.05);
        out[JERK] = jerk2.sqrt() * s.lognormal(0.05);
        out[TILT] = tilt + 0.02 * s.normal();

        // ---- sensor-side drift and faults ---------------------------------
        if active {
            match self.drift {
                Drift::GainChange => out[I_L] *= self.gain_change,
                Drift::SensorDropout => {
                    // The IMU drops off its bus in bursts.
                    if self.row == self.onset {
                        self.drop_left = 3 + (self.drift_rng.uniform() * 28.0) as usize;
                    } else if self.drop_left == 0 {
                        self.gap_left -= 1;
                        if self.gap_left == 0 {
                            self.drop_left = 3 + (self.drift_rng.uniform() * 28.0) as usize;
                        }
                    }
                    if self.drop_left > 0 {
                        for k in [AX, AY, AZ, GYRO, JERK, TILT] {
                            out[k] = f64::NAN;
                        }
                        self.drop_left -= 1;
                        if self.drop_left == 0 {
                            self.gap_left = 40 + (self.drift_rng.uniform() * 310.0) as usize;
                        }
                    }
                }
                _ => {}
            }
        }
        self.row += 1;
        mode
    }
}
