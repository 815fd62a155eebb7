//! Getting messages in: the pure decoder, the MQTT client loop and the
//! optional embedded broker.

#[cfg(feature = "embedded-broker")]
pub mod broker;
pub mod decode;
pub mod mqtt;
