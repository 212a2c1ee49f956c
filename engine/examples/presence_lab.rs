#![allow(missing_docs, clippy::unwrap_used)]
//! Research driver: presence-model variants on cached rows (not part of the product).
use weft_engine::palette::{Palette, render_mix};
use weft_engine::scene::{ClipBank, Composer, SceneRng, SoundFontRenderer, general_midi_voicings};
use weft_engine::shares::check::presence_rows;
use weft_engine::shares::{PresenceTraining, train_presence};

fn rows_for(pal: &Palette, r: &SoundFontRenderer, seeds: Vec<u64>, dur: f64) -> (Vec<f32>, Vec<bool>) {
    let comp = Composer::new(general_midi_voicings(), vec![], 0.0);
    let bank = ClipBank::new(16);
    let cands: Vec<usize> = (0..16).collect();
    let half = seeds.len() / 2;
    let (a, b) = seeds.split_at(half);
    let job = |s: &[u64]| {
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        for &seed in s {
            let mix = render_mix(Some(r), &comp, &bank, seed, &cands, 5, (-24.0, 0.0), dur, 48000).unwrap();
            presence_rows(pal, &mix, &mut rows, &mut labels).unwrap();
        }
        (rows, labels)
    };
    let (mut x, y) = std::thread::scope(|sc| {
        let h = sc.spawn(|| job(a));
        let (mut x2, mut y2) = job(b);
        let (x1, y1) = h.join().unwrap();
        let mut x = x1;
        x.append(&mut x2);
        let mut y = y1;
        y.append(&mut y2);
        (x, y)
    });
    x.shrink_to_fit();
    (x, y)
}

fn f1(model: &weft_engine::shares::PresenceModel, x: &[f32], y: &[bool], nf: usize) -> f64 {
    let d = model.features;
    let n = x.len() / d;
    let mut scratch = vec![0.0; d + model.hidden];
    let mut out = vec![0.0; nf];
    let (mut tp, mut fp, mut fneg) = (0, 0, 0);
    for i in 0..n {
        model.predict_into(&x[i * d..(i + 1) * d], &mut scratch, &mut out);
        for f in 0..nf {
            match (out[f] >= model.thresholds[f], y[i * nf + f]) {
                (true, true) => tp += 1,
                (true, false) => fp += 1,
                (false, true) => fneg += 1,
                _ => {}
            }
        }
    }
    2.0 * tp as f64 / (2 * tp + fp + fneg) as f64
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let pal = Palette::from_bytes(&std::fs::read(&args[1]).unwrap()).unwrap();
    let n_train: u64 = args[2].parse().unwrap();
    let dur: f64 = args[3].parse().unwrap();
    let mut f = std::io::BufReader::new(std::fs::File::open("/usr/share/sounds/sf2/FluidR3_GM.sf2").unwrap());
    let r = SoundFontRenderer::new(&mut f, 48000).unwrap();
    let t = std::time::Instant::now();
    let (xt, yt) = rows_for(&pal, &r, (0..n_train).map(|i| SceneRng::derive(1 ^ 0x7261_696E, i).next_u64()).collect(), dur);
    let (xh, yh) = rows_for(&pal, &r, (0..40).map(|i| 9000 + i).collect(), 6.0);
    let d = pal.presence().unwrap().features;
    eprintln!("rows {} / {} in {:.0} s", xt.len() / d, xh.len() / d, t.elapsed().as_secs_f64());
    for thr in [0.03f32, 0.05, 0.08, 0.12, 0.16, 0.2, 0.25] {
        let (mut tp, mut fp, mut fneg) = (0, 0, 0);
        for (i, row) in xh.chunks(d).enumerate() {
            for f in 0..16 {
                match (row[f] >= thr, yh[i * 16 + f]) {
                    (true, true) => tp += 1,
                    (true, false) => fp += 1,
                    (false, true) => fneg += 1,
                    _ => {}
                }
            }
        }
        println!("share >= {thr}: held-out F1 {:.3}", 2.0 * tp as f64 / (2 * tp + fp + fneg) as f64);
    }
    for spec in &args[4..] {
        // hidden:l2:epochs:lr
        let p: Vec<&str> = spec.split(':').collect();
        let opts = PresenceTraining {
            hidden: p[0].parse().unwrap(),
            l2: p[1].parse().unwrap(),
            epochs: p[2].parse().unwrap(),
            learning_rate: p[3].parse().unwrap(),
            ..PresenceTraining::default()
        };
        let keep: Vec<usize> = (0..d).filter(|&j| p.len() < 5 || match p[4] { "fam" => !(48..48 + 192).contains(&j), "atoms" => (48..48 + 192).contains(&j), "spec" => j >= 240, _ => true }).collect();
        let sub = |x: &[f32]| -> Vec<f32> { x.chunks(d).flat_map(|r| keep.iter().map(move |&j| r[j])).collect() };
        let (xs, hs) = (sub(&xt), sub(&xh));
        let t = std::time::Instant::now();
        let m = train_presence(&xs, keep.len(), &yt, 16, &opts);
        println!("{spec}: train F1 {:.3} held-out F1 {:.3} ({:.0} s)", f1(&m, &xs, &yt, 16), f1(&m, &hs, &yh, 16), t.elapsed().as_secs_f64());
    }
}
