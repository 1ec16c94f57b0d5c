//! The feature table: column order, units, descriptions and logging
//! resolution.

/// How a channel is printed. Every printed value is the channel's reading
/// quantised to its logging resolution; the text is exactly that value.
#[derive(Clone, Copy, Debug)]
pub(crate) enum Res {
    /// Fixed number of decimals.
    Fixed(usize),
    /// Number of significant digits (for channels spanning decades).
    Sig(usize),
}

pub(crate) struct Feature {
    pub name: &'static str,
    pub unit: &'static str,
    pub res: Res,
}

macro_rules! features {
    ($( $id:ident = ($name:literal, $unit:literal, $res:expr, $desc:literal); )*) => {
        #[allow(dead_code)]
        pub(crate) mod idx {
            features!(@idx 0usize; $($id)*);
        }
        pub(crate) const FEATURES: &[Feature] = &[
            $( Feature { name: $name, unit: $unit, res: $res }, )*
        ];
        pub(crate) const TABLE: &[(&str, &str, &str)] = &[ $( ($name, $unit, $desc), )* ];
    };
    (@idx $n:expr; $id:ident $($rest:ident)*) => {
        pub const $id: usize = $n;
        features!(@idx $n + 1usize; $($rest)*);
    };
    (@idx $n:expr;) => {
        pub const COUNT: usize = $n;
    };
}

features! {
    I_L = ("motor_current_left", "A", Res::Fixed(3),
        "Left drive motor current, mean magnitude over the window");
    I_R = ("motor_current_right", "A", Res::Fixed(3),
        "Right drive motor current, mean magnitude over the window");
    W_L = ("wheel_speed_left", "m/s", Res::Fixed(4),
        "Left wheel ground speed from the motor encoder");
    W_R = ("wheel_speed_right", "m/s", Res::Fixed(4),
        "Right wheel ground speed from the motor encoder");
    D_L = ("pwm_duty_left", "", Res::Fixed(4),
        "Left motor bridge duty cycle, fraction 0..1");
    D_R = ("pwm_duty_right", "", Res::Fixed(4),
        "Right motor bridge duty cycle, fraction 0..1");
    VBUS = ("bus_voltage", "V", Res::Fixed(3),
        "Drive bus voltage at the motor controller (regulated supply with droop)");
    IBUS = ("bus_current", "A", Res::Fixed(3),
        "Drive bus current into the motor controller (negative while braking recovers energy)");
    TW_L = ("winding_temp_left", "degC", Res::Fixed(2),
        "Left motor winding temperature");
    TW_R = ("winding_temp_right", "degC", Res::Fixed(2),
        "Right motor winding temperature");
    T_GB = ("gearbox_temp", "degC", Res::Fixed(2),
        "Gearbox housing temperature");
    T_DRV = ("driver_temp", "degC", Res::Fixed(2),
        "Motor driver heat-sink temperature");
    VB1 = ("vib_band1", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 5-50 Hz (chassis motion, floor unevenness)");
    VB2 = ("vib_band2", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 50-150 Hz (wheel tread, floor texture)");
    VB3 = ("vib_band3", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 150-400 Hz (first-stage gear mesh)");
    VB4 = ("vib_band4", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 400-1000 Hz (gear mesh harmonics)");
    VB5 = ("vib_band5", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 1-2.5 kHz (rolling bearings)");
    VB6 = ("vib_band6", "g^2", Res::Sig(4),
        "Sensor-pod vibration energy, 2.5-6 kHz (bearings, switching noise)");
    AX = ("accel_rms_x", "m/s^2", Res::Fixed(4),
        "IMU acceleration RMS, longitudinal axis, gravity removed");
    AY = ("accel_rms_y", "m/s^2", Res::Fixed(4),
        "IMU acceleration RMS, lateral axis");
    AZ = ("accel_rms_z", "m/s^2", Res::Fixed(4),
        "IMU acceleration RMS, vertical axis, gravity removed");
    GYRO = ("gyro_rms", "deg/s", Res::Fixed(3),
        "IMU angular rate RMS, all axes");
    JERK = ("jerk_rms", "m/s^3", Res::Fixed(3),
        "RMS of the derivative of longitudinal acceleration");
    TILT = ("tilt", "deg", Res::Fixed(3),
        "Chassis pitch from the IMU gravity vector (nose up positive)");
}

pub(crate) const N: usize = idx::COUNT;

/// Index of a feature by name.
#[cfg(test)]
pub(crate) fn index_of(name: &str) -> Option<usize> {
    FEATURES.iter().position(|f| f.name == name)
}

/// The CSV header line (without the line ending).
pub(crate) fn header() -> String {
    let mut h = String::from("t[s]");
    for f in FEATURES {
        h.push(',');
        h.push_str(f.name);
        if !f.unit.is_empty() {
            h.push('[');
            h.push_str(f.unit);
            h.push(']');
        }
    }
    h
}
