//! Holding idle CPUs to a short wake-up time while the server runs (Linux CPU latency QoS).
//!
//! Every frame crosses between threads several times (the connection, the session, a worker and back). When
//! the thread to be woken sits on an idle CPU that has gone to sleep, the wake-up waits for that CPU, and on a
//! virtual machine whose idle CPUs halt, each one costs 0.07 to 0.2 ms (BENCHMARKS.md section 3). The Linux
//! kernel's CPU latency QoS lets a process ask for a bound on that time: it opens `/dev/cpu_dma_latency`,
//! writes the bound in microseconds as a 32-bit integer, and the request holds for as long as the file stays
//! open; closing it withdraws the request (Linux kernel documentation, "PM Quality Of Service Interface",
//! Documentation/power/pm_qos_interface.rst). With 0 idle CPUs poll instead of sleeping.
//!
//! The price is power: CPUs held awake do not sleep, and on a virtual machine the host sees them busy. That is
//! the usual trade for a box dedicated to real-time work (common practice, no source); the server only does it
//! when the `cpu_wake_latency_us` setting asks for it.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The kernel's CPU latency QoS device.
pub const CPU_LATENCY_DEVICE: &str = "/dev/cpu_dma_latency";

/// Largest bound accepted, in microseconds. The kernel's own default (no request) is 2,000 seconds; a bound
/// of a second or more would hold nothing back that matters for frames.
pub const MAX_WAKE_LATENCY_US: u32 = 1_000_000;

/// A held CPU latency request; dropping it withdraws the request.
#[derive(Debug)]
pub struct CpuWakeHold {
    device: PathBuf,
    microseconds: u32,
    _file: File,
}

/// The request could not be made.
#[derive(Debug, thiserror::Error)]
#[error(
    "cpu_wake_latency_us = {microseconds}: cannot hold the CPU wake-up time through {device}: {cause}. The \
     server needs write access to it (it is root's alone by default; a udev rule can give the server's group \
     access), or leave cpu_wake_latency_us unset"
)]
pub struct WakeHoldError {
    device: String,
    microseconds: u32,
    cause: std::io::Error,
}

impl CpuWakeHold {
    /// Asks that idle CPUs wake within `microseconds`, through the latency QoS device at `device`.
    pub fn hold(device: &Path, microseconds: u32) -> Result<Self, WakeHoldError> {
        let fail = |cause| WakeHoldError {
            device: device.display().to_string(),
            microseconds,
            cause,
        };
        let value = i32::try_from(microseconds).map_err(|_| {
            fail(std::io::Error::new(
                std::io::ErrorKind::InvalidInput,
                "out of range",
            ))
        })?;
        let mut file = File::options().write(true).open(device).map_err(fail)?;
        // The device takes the value as the 4 bytes of a native-endian s32 (a text form exists too).
        file.write_all(&value.to_ne_bytes()).map_err(fail)?;
        Ok(Self {
            device: device.to_path_buf(),
            microseconds,
            _file: file,
        })
    }

    /// The bound asked for, in microseconds.
    pub fn microseconds(&self) -> u32 {
        self.microseconds
    }

    /// The device the request is held on.
    pub fn device(&self) -> &Path {
        &self.device
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_bound_is_written_as_a_native_endian_s32() {
        // The device format: "write an s32 value to the open device node" (Linux kernel documentation,
        // Documentation/power/pm_qos_interface.rst). A plain file stands in for the device here.
        let dir = std::env::temp_dir().join(format!("framewise-wake-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("temp dir");
        let path = dir.join("latency");
        std::fs::write(&path, b"").expect("file");
        let hold = CpuWakeHold::hold(&path, 20).expect("hold");
        assert_eq!(hold.microseconds(), 20);
        assert_eq!(hold.device(), path.as_path());
        let bytes = std::fs::read(&path).expect("read back");
        assert_eq!(bytes, 20i32.to_ne_bytes());
        drop(hold);
        std::fs::remove_dir_all(&dir).expect("clean up");
    }

    #[test]
    fn a_device_that_cannot_be_opened_gives_an_error_that_says_what_to_do() {
        let err = CpuWakeHold::hold(Path::new("/nonexistent/framewise/cpu_latency"), 0)
            .expect_err("no such device");
        let text = err.to_string();
        assert!(text.contains("cpu_wake_latency_us = 0"), "{text}");
        assert!(
            text.contains("/nonexistent/framewise/cpu_latency"),
            "{text}"
        );
        assert!(text.contains("write access"), "{text}");
    }
}
