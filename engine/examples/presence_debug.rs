#![allow(missing_docs, clippy::unwrap_used)]
use weft_engine::palette::{Palette, render_mix};
use weft_engine::scene::{ClipBank, Composer, SoundFontRenderer, general_midi_voicings};
use weft_engine::shares::check::presence_rows;


fn main() {
    let args: Vec<String> = std::env::args().collect();
    let bytes = std::fs::read(&args[1]).unwrap();
    let pal = Palette::from_bytes(&bytes).unwrap();
    let mut f = std::io::BufReader::new(std::fs::File::open("/usr/share/sounds/sf2/FluidR3_GM.sf2").unwrap());
    let r = SoundFontRenderer::new(&mut f, 48000).unwrap();
    let comp = Composer::new(general_midi_voicings(), vec![], 0.0);
    let bank = ClipBank::new(16);
    let model = pal.presence().unwrap().clone();
    let nf = 16;
    let mut counts = vec![[0usize; 4]; nf];
    let cands: Vec<usize> = (0..16).collect();
    for i in 0..20u64 {
        let seed = if args.len() > 2 { weft_engine::scene::SceneRng::derive(1 ^ 0x7261_696E, i).next_u64() } else { 9000 + i };
        let mix = render_mix(Some(&r), &comp, &bank, seed, &cands, 5, (-24.0, 0.0), 6.0, 48000).unwrap();
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        let n = presence_rows(&pal, &mix, &mut rows, &mut labels).unwrap();
        let d = model.features;
        let mut scratch = vec![0.0; d + model.hidden];
        let mut out = vec![0.0; nf];
        for k in 0..n {
            model.predict_into(&rows[k * d..(k + 1) * d], &mut scratch, &mut out);
            for fam in 0..nf {
                let p = out[fam] >= model.thresholds[fam];
                let y = labels[k * nf + fam];
                let idx = match (p, y) { (true, true) => 0, (true, false) => 1, (false, true) => 2, _ => 3 };
                counts[fam][idx] += 1;
            }
        }
    }
    let tot = counts.iter().fold([0usize; 4], |a, c| [a[0] + c[0], a[1] + c[1], a[2] + c[2], a[3] + c[3]]);
    println!("micro F1 {:.3}", 2.0 * tot[0] as f64 / (2 * tot[0] + tot[1] + tot[2]) as f64);
    for (fam, c) in counts.iter().enumerate() {
        let f1 = 2.0 * c[0] as f64 / (2 * c[0] + c[1] + c[2]).max(1) as f64;
        println!("{:<24} tp {:5} fp {:5} fn {:5} tn {:5} F1 {:.2} thr {:.2}", pal.families()[fam].name, c[0], c[1], c[2], c[3], f1, model.thresholds[fam]);
    }
}
