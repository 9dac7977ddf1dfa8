//! `assign` with 1 000 experiments held: the request-path cost of the client.

use apportion_client::{Client, ClientConfig};
use criterion::{criterion_group, criterion_main, Criterion};

fn assign(c: &mut Criterion) {
    let client = Client::offline(ClientConfig::new("unused"), Box::new(|| 1_000));
    for e in 0..1_000 {
        let msg = format!(
            r#"{{"experiment":"experiment-{e}","version":1,"state":"learning","published_at_ms":1000,"weights":{{"warm":0.5,"cool":0.3,"mono":0.15,"gold":0.05}}}}"#
        );
        client.offer(&format!("experiment-{e}"), Some(msg.as_bytes()));
    }
    let units: Vec<String> = (0..4096).map(|u| format!("user-{u:08}")).collect();
    let mut i = 0usize;
    c.bench_function("assign/1000-experiments/4-arms", |b| {
        b.iter(|| {
            i = i.wrapping_add(1);
            client.assign("experiment-517", &units[i & 4095]).expect("weights")
        })
    });
}

criterion_group!(benches, assign);
criterion_main!(benches);
