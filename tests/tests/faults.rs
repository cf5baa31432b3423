//! Faults, load and shutdown against real server processes: disconnects, slow readers, idle sessions,
//! floods, kill and restart during replay, SIGTERM with live sessions, and a bounded soak.
