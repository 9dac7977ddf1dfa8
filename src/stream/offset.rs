//! Where reading an input partition goes on: what a snapshot records, what is committed to the
//! group (for lag reporting), and where a partition taken over starts.

use rdkafka::Offset;

/// The offset of the next message to apply on an input partition.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct NextOffset {
    pub partition: i32,
    pub offset: i64,
}

impl NextOffset {
    /// The start offset to give librdkafka: the partition's beginning when nothing was read.
    pub fn start(self) -> Offset {
        if self.offset > 0 {
            Offset::Offset(self.offset)
        } else {
            Offset::Beginning
        }
    }
}
