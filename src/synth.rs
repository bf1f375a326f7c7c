//! Invented test data: two extracts of the people of a fictional region, with known truth.
//!
//! The region, the Vale of Kessry, has towns, streets and a postcode scheme of our own
//! (three letters for the town, four digits: "KSB 2041"). Names are built from syllables, so
//! nobody real is described. People live in households (shared surname, address, postcode and
//! landline), surnames and given names follow Zipf laws (members of one household have
//! different given names), and some household members are twins: the confusions
//! real extracts have. The right table re-records a share of the left table's people with
//! typing slips, day-month swaps, moves, missing values and case and accent variants.
//!
//! Out: left and right tables, the truth (left id, right id) and a ready config text. Seeded:
//! the same arguments give the same bytes.

use crate::rng::Rng;

const GIVEN_HEADS: &[&str] = &[
    "Al", "Bren", "Cor", "Dav", "El", "Fen", "Gal", "Har", "Is", "Jor", "Kel", "Lis", "Mar", "Nor",
    "Os", "Per", "Quin", "Ros", "Sel", "Tam", "Ul", "Ven", "Wyn", "Yor", "Zel", "Ans", "Bel",
    "Cal", "Dor", "Em", "Fil", "Gor", "Hal", "Iv", "Jas", "Kor", "Lun", "Mer", "Nel", "Ot",
];
const GIVEN_TAILS: &[&str] = &[
    "a", "en", "is", "o", "an", "eth", "ia", "or", "un", "ey", "ar", "in", "ette", "ric", "wen",
];
const SURNAME_HEADS: &[&str] = &[
    "Ash", "Brack", "Cold", "Dun", "Fair", "Gren", "Hollow", "Kirk", "Lang", "Moor", "Nether",
    "Oak", "Pen", "Rad", "Stan", "Thorn", "Wester", "Whit", "Yarrow", "Brim", "Calder", "Dray",
    "Elm", "Frost", "Gal", "Heth", "Ivel", "Jessop", "Kell", "Loft", "Marr", "Nolt", "Orr", "Pask",
    "Quill", "Rook", "Sallow", "Tarn", "Umber", "Vell",
];
const SURNAME_TAILS: &[&str] = &[
    "by", "den", "field", "ford", "gate", "ham", "holt", "ley", "mere", "ridge", "stow", "well",
    "wick", "worth", "acre", "bourne", "combe", "dale",
];
/// Middle syllables that multiply the surname stock for large populations.
const SURNAME_MIDDLES: &[&str] = &[
    "", "a", "en", "er", "in", "on", "el", "ar", "is", "um", "ot", "ig", "ed", "ow", "ul", "ith",
];
const TOWNS: &[(&str, &str)] = &[
    ("Kessry Bridge", "KSB"),
    ("Orlow", "ORW"),
    ("Tamsfold", "TMF"),
    ("Upper Brannock", "UBR"),
    ("Selwick", "SLW"),
    ("Marrowby", "MRB"),
    ("Dunhallow", "DNH"),
    ("Fenmouth", "FNM"),
];
const STREET_NAMES: &[&str] = &[
    "Lantern",
    "Miller",
    "Chapel",
    "Beacon",
    "Willow",
    "Tanner",
    "Orchard",
    "Harbour",
    "Ferry",
    "Granary",
    "Weaver",
    "Cooper",
    "Heron",
    "Kestrel",
    "Quarry",
    "Spindle",
    "Saltmarsh",
    "Bell",
];
const STREET_KINDS: &[&str] = &["Street", "Lane", "Road", "Row", "Close", "Walk", "Hill"];

/// Settings of the generator.
#[derive(Debug, Clone)]
pub struct SynthOptions {
    /// Records in each table.
    pub rows: usize,
    /// Share of the left table's people who are also in the right table.
    pub overlap: f64,
    /// Amount of recording noise, 0 (clean) to 1 (very noisy).
    pub noise: f64,
    /// Seed.
    pub seed: u64,
    /// Chance that a child is the twin of the child born before it ([`TWIN_CHANCE`] is the
    /// realistic default; raise it to stress the household confusions).
    pub twins: f64,
}

/// One person as recorded in one table.
#[derive(Debug, Clone)]
struct Person {
    given: String,
    surname: String,
    birth: (i32, u8, u8),
    sex: char,
    house: u32,
    street: usize,
    town: usize,
    sector: u32,
    phone: Option<String>,
}

/// The generated tables as CSV text, and the truth.
#[derive(Debug, Clone)]
pub struct Synthetic {
    /// left.csv.
    pub left_csv: String,
    /// right.csv.
    pub right_csv: String,
    /// truth.csv (`left_id,right_id`).
    pub truth_csv: String,
    /// A ready config for the two tables.
    pub config_toml: String,
    /// Number of true pairs.
    pub true_pairs: usize,
}

fn zipf_cumulative(n: usize, s: f64) -> Vec<f64> {
    let mut acc = 0.0;
    (1..=n)
        .map(|k| {
            acc += 1.0 / (k as f64).powf(s);
            acc
        })
        .collect()
}

/// Zipf exponent of the given-name shares: the commonest name is about one in twenty, as in
/// real name stocks, where a few names are very common (the reason value-frequency weighting
/// exists).
const GIVEN_ZIPF: f64 = 0.7;

fn given_name(rng: &mut Rng, stock: &[String], zipf: &[f64]) -> String {
    stock[rng.pick_cumulative(zipf)].clone()
}

fn random_birth(rng: &mut Rng, lo: i32, hi: i32) -> (i32, u8, u8) {
    let year = lo + rng.below((hi - lo + 1) as usize) as i32;
    let month = 1 + rng.below(12) as u8;
    let day = 1 + rng.below(crate::text::days_in_month(year, month) as usize) as u8;
    (year, month, day)
}

fn phone(rng: &mut Rng) -> String {
    format!(
        "0{}{} {:06}",
        2 + rng.below(7),
        10 + rng.below(90),
        rng.below(1_000_000)
    )
}

/// House numbers per street: the region grows with its population, so that a postcode (a
/// street sector and a run of ten house numbers) keeps holding a few households.
fn houses(population: usize) -> usize {
    180 * (population / 50_000).max(1)
}

/// The default chance that a child is the twin of the child born before it. Twin deliveries
/// are about 1.2 to 1.7 in 100 in Europe (from memory), which makes about 3 in 100 children
/// twins. An earlier default of 0.5 made about a third of all children twins, ten times the
/// real share; `--twins 0.5` still builds that stress case.
pub const TWIN_CHANCE: f64 = 0.015;

/// Builds households until `n` people exist.
fn population(rng: &mut Rng, n: usize, twins: f64) -> Vec<Person> {
    let mut surnames: Vec<String> = Vec::new();
    for h in SURNAME_HEADS {
        for m in SURNAME_MIDDLES {
            for t in SURNAME_TAILS {
                surnames.push(format!("{h}{m}{t}"));
            }
        }
    }
    rng.shuffle(&mut surnames);
    // The stock grows with the population, as real surname stocks do; Zipf shares with
    // exponent 0.75 make the commonest surname a share of one to a few in a hundred.
    surnames.truncate((n / 4).clamp(500, surnames.len()));
    let zipf = zipf_cumulative(surnames.len(), 0.75);
    let mut given_stock: Vec<String> = GIVEN_HEADS
        .iter()
        .flat_map(|h| GIVEN_TAILS.iter().map(move |t| format!("{h}{t}")))
        .collect();
    rng.shuffle(&mut given_stock);
    let given_zipf = zipf_cumulative(given_stock.len(), GIVEN_ZIPF);
    let mut people = Vec::with_capacity(n + 6);
    while people.len() < n {
        let surname = surnames[rng.pick_cumulative(&zipf)].clone();
        let town = rng.below(TOWNS.len());
        let street = rng.below(STREET_NAMES.len() * STREET_KINDS.len());
        let house = 1 + rng.below(houses(n)) as u32;
        let sector = (street as u32 * 7 + town as u32 * 3) % 100;
        let landline = rng.chance(0.6).then(|| phone(rng));
        let size = 1 + rng.below(4) + usize::from(rng.chance(0.1));
        let parent_birth = random_birth(rng, 1940, 1985);
        let mut twin: Option<(i32, u8, u8)> = None;
        let mut names: Vec<String> = Vec::with_capacity(size);
        for member in 0..size {
            // Members of one household have different given names.
            let mut given = given_name(rng, &given_stock, &given_zipf);
            while names.contains(&given) {
                given = given_name(rng, &given_stock, &given_zipf);
            }
            names.push(given.clone());
            let birth = if member < 2 {
                let (y, _, _) = parent_birth;
                random_birth(rng, y - 3, y + 3)
            } else if let Some(t) = twin.filter(|_| rng.chance(twins)) {
                t
            } else {
                let b = random_birth(rng, parent_birth.0 + 18, (parent_birth.0 + 40).min(2015));
                twin = Some(b);
                b
            };
            let own_surname = if member == 1 && rng.chance(0.2) {
                surnames[rng.pick_cumulative(&zipf)].clone()
            } else {
                surname.clone()
            };
            people.push(Person {
                given,
                surname: own_surname,
                birth,
                sex: if rng.chance(0.5) { 'F' } else { 'M' },
                house,
                street,
                town,
                sector,
                phone: if rng.chance(0.3) {
                    Some(phone(rng))
                } else {
                    landline.clone()
                },
            });
        }
    }
    people.truncate(n);
    people
}

/// A keying slip: substitution, deletion, insertion or transposition of one letter.
fn typo(rng: &mut Rng, s: &str) -> String {
    let mut c: Vec<char> = s.chars().collect();
    if c.len() < 3 {
        return s.to_string();
    }
    let i = 1 + rng.below(c.len() - 2);
    let letter = (b'a' + rng.below(26) as u8) as char;
    match rng.below(4) {
        0 => c[i] = letter,
        1 => {
            c.remove(i);
        }
        2 => c.insert(i, letter),
        _ => c.swap(i, i + 1),
    }
    c.into_iter().collect()
}

/// Case, spacing and accent variants that cleaning should undo.
fn restyle(rng: &mut Rng, s: &str) -> String {
    match rng.below(6) {
        0 => s.to_uppercase(),
        1 => format!(" {s} "),
        2 => s.replacen('e', "é", 1),
        _ => s.to_string(),
    }
}

/// The person as written down again, with slips in proportion to `noise`.
fn rerecord(rng: &mut Rng, p: &Person, noise: f64, houses: usize) -> Person {
    let mut q = p.clone();
    if rng.chance(0.35 * noise) {
        q.given = typo(rng, &q.given);
    }
    if rng.chance(0.25 * noise) {
        q.surname = typo(rng, &q.surname);
    }
    let (y, m, d) = q.birth;
    if rng.chance(0.08 * noise) && d <= 12 && d != m {
        q.birth = (y, d, m);
    } else if rng.chance(0.10 * noise) {
        q.birth = match rng.below(3) {
            0 => (y + if rng.chance(0.5) { 1 } else { -1 }, m, d),
            1 => (y, m, if d < 28 { d + 1 } else { d - 1 }),
            _ => (y, if m < 12 { m + 1 } else { m - 1 }, d.min(28)),
        };
        // A slip still gives a calendar date (a leap day moved to another year, say).
        let (y, m, d) = q.birth;
        q.birth = (y, m, d.min(crate::text::days_in_month(y, m)));
    }
    if rng.chance(0.3 * noise) {
        q.town = rng.below(TOWNS.len());
        q.street = rng.below(STREET_NAMES.len() * STREET_KINDS.len());
        q.house = 1 + rng.below(houses) as u32;
        q.sector = (q.street as u32 * 7 + q.town as u32 * 3) % 100;
        q.phone = None;
    }
    if rng.chance(0.3 * noise) {
        q.phone = Some(phone(rng));
    }
    if rng.chance(0.01 * noise) {
        q.sex = if q.sex == 'F' { 'M' } else { 'F' };
    }
    q
}

struct Row {
    id: String,
    cells: Vec<String>,
}

fn write_row(p: &Person, id: String, rng: &mut Rng, noise: f64) -> Row {
    let miss =
        |rng: &mut Rng, rate: f64, v: String| if rng.chance(rate) { String::new() } else { v };
    let (town, code) = TOWNS[p.town];
    let street = format!(
        "{} {} {}",
        p.house,
        STREET_NAMES[p.street % STREET_NAMES.len()],
        STREET_KINDS[p.street / STREET_NAMES.len()]
    );
    let (y, m, d) = p.birth;
    let birth = if rng.chance(0.03 * noise) {
        format!("{y:04}")
    } else {
        format!("{y:04}-{m:02}-{d:02}")
    };
    let given = restyle(rng, &p.given);
    let surname = restyle(rng, &p.surname);
    let cells = vec![
        miss(rng, 0.02 * noise, given),
        miss(rng, 0.01 * noise, surname),
        miss(rng, 0.03 * noise, birth),
        miss(rng, 0.02, p.sex.to_string()),
        miss(rng, 0.08 * noise, street),
        miss(rng, 0.05 * noise, town.to_string()),
        miss(
            rng,
            0.05 * noise,
            format!("{code} {:02}{:02}", p.sector, p.house / 10),
        ),
        p.phone
            .clone()
            .filter(|_| !rng.chance(0.2))
            .unwrap_or_default(),
    ];
    Row { id, cells }
}

fn csv_text(header: &[&str], rows: &[Row]) -> String {
    let mut w = csv::WriterBuilder::new().from_writer(Vec::new());
    let _ = w.write_record(header);
    for r in rows {
        let mut rec = vec![r.id.as_str()];
        rec.extend(r.cells.iter().map(String::as_str));
        let _ = w.write_record(&rec);
    }
    String::from_utf8(w.into_inner().unwrap_or_default()).unwrap_or_default()
}

const LEFT_HEADER: &[&str] = &[
    "rec_id",
    "given_name",
    "surname",
    "birth_date",
    "sex",
    "street",
    "town",
    "postcode",
    "phone",
];
const RIGHT_HEADER: &[&str] = &[
    "rec_id",
    "first_name",
    "last_name",
    "dob",
    "sex",
    "address",
    "town",
    "postcode",
    "phone",
];

/// The config written beside generated tables.
pub const CONFIG: &str = r#"# Generated by `dovetail synth`: links the two invented extracts beside this file.
[left]
path = "left.csv"
id = "rec_id"

[right]
path = "right.csv"
id = "rec_id"

[[field]]
name = "given"
left = "given_name"
right = "first_name"
method = "jaro-winkler"
bands = [0.94, 0.85]

[[field]]
name = "surname"
left = "surname"
right = "last_name"
method = "jaro-winkler"
bands = [0.94, 0.85]

[[field]]
name = "birth"
left = "birth_date"
right = "dob"
method = "date"

[[field]]
name = "sex"
method = "exact"

# The street is left out on purpose: people of one household share street, postcode and
# landline, and comparing all three would count one piece of evidence (same address) three
# times, against the conditional independence the model assumes.
[[field]]
name = "postcode"
method = "exact"
normalize = "code"

[[field]]
name = "phone"
method = "exact"
normalize = "digits"

# Two passes: same surname sound and birth year, or same postcode and first initial.
[[block]]
keys = ["surname:soundex", "birth:year"]

[[block]]
keys = ["postcode", "given:first:1"]

[link]
min_confidence = 0.5
"#;

/// Generates the two tables and their truth.
pub fn generate(opts: &SynthOptions) -> Synthetic {
    let mut rng = Rng::new(opts.seed);
    let n = opts.rows;
    let overlap = opts.overlap.clamp(0.0, 1.0);
    let shared = (n as f64 * overlap).round() as usize;
    let people = population(&mut rng, 2 * n - shared, opts.twins.clamp(0.0, 1.0));
    let mut order: Vec<usize> = (0..people.len()).collect();
    rng.shuffle(&mut order);
    let left_people: Vec<usize> = order[..n].to_vec();
    let mut right_people: Vec<(usize, Option<usize>)> = left_people[..shared]
        .iter()
        .enumerate()
        .map(|(li, &p)| (p, Some(li)))
        .collect();
    right_people.extend(order[n..].iter().map(|&p| (p, None)));
    rng.shuffle(&mut right_people);
    // Ids are drawn at random so that row order says nothing about the truth.
    let mut left_ids: Vec<u32> = (0..n as u32).collect();
    rng.shuffle(&mut left_ids);
    let mut right_ids: Vec<u32> = (0..right_people.len() as u32).collect();
    rng.shuffle(&mut right_ids);
    let lid = |i: usize| format!("L{:07}", left_ids[i]);
    let rid = |j: usize| format!("R{:07}", right_ids[j]);
    let left_rows: Vec<Row> = left_people
        .iter()
        .enumerate()
        .map(|(i, &p)| {
            let rec = rerecord(&mut rng, &people[p], 0.3 * opts.noise, houses(people.len()));
            write_row(&rec, lid(i), &mut rng, opts.noise)
        })
        .collect();
    let mut truth = Vec::new();
    let right_rows: Vec<Row> = right_people
        .iter()
        .enumerate()
        .map(|(j, &(p, li))| {
            if let Some(li) = li {
                truth.push((lid(li), rid(j)));
            }
            let rec = rerecord(&mut rng, &people[p], opts.noise, houses(people.len()));
            write_row(&rec, rid(j), &mut rng, opts.noise)
        })
        .collect();
    truth.sort();
    let mut t = String::from("left_id,right_id\n");
    for (a, b) in &truth {
        t.push_str(&format!("{a},{b}\n"));
    }
    Synthetic {
        left_csv: csv_text(LEFT_HEADER, &left_rows),
        right_csv: csv_text(RIGHT_HEADER, &right_rows),
        truth_csv: t,
        config_toml: CONFIG.to_string(),
        true_pairs: truth.len(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_bytes_and_right_sizes() {
        let o = SynthOptions {
            rows: 300,
            overlap: 0.6,
            noise: 0.3,
            seed: 4,
            twins: TWIN_CHANCE,
        };
        let a = generate(&o);
        let b = generate(&o);
        assert_eq!(a.left_csv, b.left_csv);
        assert_eq!(a.right_csv, b.right_csv);
        assert_eq!(a.true_pairs, 180);
        assert_eq!(a.left_csv.lines().count(), 301);
        assert_eq!(a.right_csv.lines().count(), 301);
        assert!(
            crate::config::Config::from_text(&a.config_toml, std::path::Path::new(".")).is_ok()
        );
    }
}
