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
use std::collections::HashMap;

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
    /// The household the person belongs to (an index in order of creation).
    household: u32,
}

/// The hard cases of real extracts, each off (0 or empty) by default; with every knob off the
/// tables are byte for byte those of [`generate`]. Each knob draws from a random stream of its
/// own, apart from the re-recording of the rows it changes.
#[derive(Debug, Clone, Default)]
pub struct Scenario {
    /// Share of the right table's people who moved since the left table was made (a new
    /// town, street, house, postcode, and no landline). None keeps the default, 0.3 x noise.
    pub movers: Option<f64>,
    /// Share of the movers whose whole household moved with them, to one new address.
    pub household_moves: f64,
    /// Share of the right table's people who are not in the left table that are instead
    /// relatives or neighbours of a left person who is also not in the right table
    /// (household members, same-name juniors, twins, neighbours): the false pairs that look
    /// most like true ones.
    pub relatives: f64,
    /// Share of each table's records that have a second, re-keyed record of the same person
    /// in the same table (duplicates the one-to-one model does not expect).
    pub duplicates: f64,
    /// Columns blanked at a rate, by header name (`dob`, `birth_date`, `postcode`, ...).
    pub blank: Vec<(String, f64)>,
}

impl Scenario {
    /// Checks the shares of `opts` and `self` (each within [0, 1], at least one row) and
    /// adds the `column=rate` entries of `blank` (as `--blank` takes them) to the blanked
    /// columns; errors are config errors naming the options as the CLI spells them.
    pub fn check(&mut self, opts: &SynthOptions, blank: &[String]) -> crate::Result<()> {
        use crate::Error;
        if opts.rows == 0 {
            return Err(Error::config("--rows must be at least 1"));
        }
        let shares = [
            opts.overlap,
            opts.noise,
            opts.twins,
            self.movers.unwrap_or(0.0),
            self.household_moves,
            self.relatives,
            self.duplicates,
        ];
        if shares.iter().any(|v| !(0.0..=1.0).contains(v)) {
            return Err(Error::config(
                "--overlap, --noise, --twins, --movers, --household-moves, --relatives and --duplicates must lie within [0, 1]",
            ));
        }
        for b in blank {
            let parsed = Scenario::parse_blank(b)
                .filter(|(col, _)| Scenario::blank_columns().contains(&col.as_str()));
            match parsed {
                Some(p) => self.blank.push(p),
                None => {
                    return Err(Error::config(format!(
                        "--blank `{b}`: give COLUMN=RATE with a rate in [0, 1] and one of the columns {}",
                        Scenario::blank_columns().join(", ")
                    )))
                }
            }
        }
        Ok(())
    }

    /// Parses `column=rate` (a `--blank` argument).
    pub fn parse_blank(text: &str) -> Option<(String, f64)> {
        let (col, rate) = text.split_once('=')?;
        let rate: f64 = rate.trim().parse().ok()?;
        (!col.trim().is_empty() && (0.0..=1.0).contains(&rate))
            .then(|| (col.trim().to_string(), rate))
    }

    /// The columns `--blank` may name.
    pub fn blank_columns() -> Vec<&'static str> {
        let mut c: Vec<&str> = LEFT_HEADER[1..]
            .iter()
            .chain(&RIGHT_HEADER[1..])
            .copied()
            .collect();
        c.sort_unstable();
        c.dedup();
        c
    }
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

impl Synthetic {
    /// The files `dovetail synth` writes, by name, in order.
    pub fn files(&self) -> [(&'static str, &str); 4] {
        [
            ("left.csv", &self.left_csv),
            ("right.csv", &self.right_csv),
            ("truth.csv", &self.truth_csv),
            ("config.toml", &self.config_toml),
        ]
    }

    /// Writes [`Synthetic::files`] into `dir` (created if needed), all or none.
    pub fn write_to(&self, dir: &std::path::Path) -> crate::Result<()> {
        let mut out = crate::folder::OutputSet::new(dir)?;
        for (name, text) in self.files() {
            out.write(name, |w| w.write_all(text.as_bytes()))?;
        }
        out.commit()?;
        Ok(())
    }
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
fn population(rng: &mut Rng, n: usize, twins: f64) -> (Vec<Person>, Vec<String>, Vec<f64>) {
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
    let mut household = 0u32;
    while people.len() < n {
        household += 1;
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
                household,
            });
        }
    }
    people.truncate(n);
    (people, surnames, zipf)
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

/// A new address: town, street, house and postcode sector.
fn new_address(rng: &mut Rng, houses: usize) -> (usize, usize, u32, u32) {
    let town = rng.below(TOWNS.len());
    let street = rng.below(STREET_NAMES.len() * STREET_KINDS.len());
    let house = 1 + rng.below(houses) as u32;
    (
        town,
        street,
        house,
        (street as u32 * 7 + town as u32 * 3) % 100,
    )
}

/// How a record is moved: the chance it moved, and where its household moved to, if the
/// household moved together.
struct Moves<'a> {
    chance: f64,
    household: &'a HashMap<u32, (usize, usize, u32, u32)>,
}

/// The person as written down again, with slips in proportion to `noise` and a move with
/// `moves.chance`.
fn rerecord(rng: &mut Rng, p: &Person, noise: f64, houses: usize, moves: &Moves) -> Person {
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
    if rng.chance(moves.chance) {
        let drawn = new_address(rng, houses);
        (q.town, q.street, q.house, q.sector) =
            moves.household.get(&p.household).copied().unwrap_or(drawn);
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
    generate_scenario(opts, &Scenario::default())
}

/// A relative or neighbour of `p`, living at or next to p's address (see
/// [`Scenario::relatives`]): a household member, a same-name junior, a twin or a neighbour.
fn relative_of(rng: &mut Rng, p: &Person, other: &Person) -> Person {
    let mut q = p.clone();
    q.household = p.household;
    let (y, _, _) = p.birth;
    let other_given = |q: &mut Person| {
        q.given = if other.given != p.given {
            other.given.clone()
        } else {
            format!("{}a", other.given)
        };
    };
    match rng.below(20) {
        // A household member: a spouse or a sibling.
        0..=6 => {
            other_given(&mut q);
            q.birth = random_birth(rng, y - 3, y + 3);
            q.sex = if rng.chance(0.5) { 'F' } else { 'M' };
        }
        // A same-name junior or senior.
        7..=11 => {
            let gap = 20 + rng.below(16) as i32;
            let year = if y + gap <= 2015 { y + gap } else { y - gap };
            q.birth = random_birth(rng, year, year);
        }
        // A twin.
        12..=14 => {
            other_given(&mut q);
            q.sex = if rng.chance(0.5) { 'F' } else { 'M' };
        }
        // A neighbour: another family a few doors away. Its own birth date: with another
        // person's given name, sex and birth date all three, a neighbour was a copy of a
        // random person under a new surname (for left people, one right record in 15 had a
        // namesake born the same day, twenty times what chance gives).
        _ => {
            q.given = other.given.clone();
            q.surname = other.surname.clone();
            q.birth = random_birth(rng, 1940, 2015);
            q.sex = other.sex;
            q.house = (p.house + 1 + rng.below(4) as u32).max(1);
            q.household = u32::MAX;
            q.phone = other.phone.clone().filter(|_| rng.chance(0.5));
        }
    }
    q
}

/// The streams of the scenario knobs (apart from the base generator's).
const STREAM_MOVES: u64 = 101;
const STREAM_RELATIVES: u64 = 102;
const STREAM_DUPLICATES: u64 = 103;
const STREAM_BLANK: u64 = 104;

/// Generates the two tables and their truth for a scenario (see [`Scenario`]). The truth
/// holds every pair of a left and a right record of one person, so with duplicates a person
/// can have more than one true pair.
pub fn generate_scenario(opts: &SynthOptions, sc: &Scenario) -> Synthetic {
    let mut rng = Rng::new(opts.seed);
    let n = opts.rows;
    let overlap = opts.overlap.clamp(0.0, 1.0);
    let shared = (n as f64 * overlap).round() as usize;
    let (mut people, surnames, surname_zipf) =
        population(&mut rng, 2 * n - shared, opts.twins.clamp(0.0, 1.0));
    let house_count = houses(people.len());
    let mut order: Vec<usize> = (0..people.len()).collect();
    rng.shuffle(&mut order);
    let left_people: Vec<usize> = order[..n].to_vec();
    let mut extra: Vec<usize> = order[n..].to_vec();
    if sc.relatives > 0.0 && !left_people.is_empty() {
        let mut r = Rng::stream(opts.seed, STREAM_RELATIVES);
        let k = (extra.len() as f64 * sc.relatives.clamp(0.0, 1.0)).round() as usize;
        for slot in extra.iter_mut().take(k) {
            let of = &people[left_people[r.below(left_people.len())]];
            let mut other = people[r.below(people.len())].clone();
            other.surname = surnames[r.pick_cumulative(&surname_zipf)].clone();
            let rel = relative_of(&mut r, of, &other);
            people.push(rel);
            *slot = people.len() - 1;
        }
    }
    let mut right_people: Vec<(usize, Option<usize>)> = left_people[..shared]
        .iter()
        .enumerate()
        .map(|(li, &p)| (p, Some(li)))
        .collect();
    right_people.extend(extra.iter().map(|&p| (p, None)));
    rng.shuffle(&mut right_people);
    // Ids are drawn at random so that row order says nothing about the truth.
    let mut left_ids: Vec<u32> = (0..n as u32).collect();
    rng.shuffle(&mut left_ids);
    let mut right_ids: Vec<u32> = (0..right_people.len() as u32).collect();
    rng.shuffle(&mut right_ids);
    let lid = |i: usize| format!("L{:07}", left_ids[i]);
    let rid = |j: usize| format!("R{:07}", right_ids[j]);
    // Households that move together, each to one new address.
    let mut household_address: HashMap<u32, (usize, usize, u32, u32)> = HashMap::new();
    if sc.household_moves > 0.0 {
        let mut r = Rng::stream(opts.seed, STREAM_MOVES);
        let mut households: Vec<u32> = people.iter().map(|p| p.household).collect();
        households.sort_unstable();
        households.dedup();
        for h in households {
            if r.chance(sc.household_moves) {
                household_address.insert(h, new_address(&mut r, house_count));
            }
        }
    }
    let stay = HashMap::new();
    let left_moves = Moves {
        chance: 0.3 * 0.3 * opts.noise,
        household: &stay,
    };
    let right_moves = Moves {
        chance: sc.movers.unwrap_or(0.3 * opts.noise),
        household: &household_address,
    };
    // (record, person) per row; ids as written.
    let mut left_rows: Vec<(Row, usize)> = left_people
        .iter()
        .enumerate()
        .map(|(i, &p)| {
            let rec = rerecord(
                &mut rng,
                &people[p],
                0.3 * opts.noise,
                house_count,
                &left_moves,
            );
            (write_row(&rec, lid(i), &mut rng, opts.noise), p)
        })
        .collect();
    let mut right_rows: Vec<(Row, usize)> = right_people
        .iter()
        .enumerate()
        .map(|(j, &(p, _))| {
            let rec = rerecord(&mut rng, &people[p], opts.noise, house_count, &right_moves);
            (write_row(&rec, rid(j), &mut rng, opts.noise), p)
        })
        .collect();
    if sc.duplicates > 0.0 {
        let mut r = Rng::stream(opts.seed, STREAM_DUPLICATES);
        for (rows, prefix, moves) in [
            (&mut left_rows, 'L', &left_moves),
            (&mut right_rows, 'R', &right_moves),
        ] {
            let k = (rows.len() as f64 * sc.duplicates.clamp(0.0, 1.0)).round() as usize;
            let mut pick: Vec<usize> = (0..rows.len()).collect();
            r.shuffle(&mut pick);
            let base = rows.len();
            for (j, &i) in pick.iter().take(k).enumerate() {
                let p = rows[i].1;
                let rec = rerecord(&mut r, &people[p], opts.noise.max(0.3), house_count, moves);
                let id = format!("{prefix}{:07}", base + j);
                rows.push((write_row(&rec, id, &mut r, opts.noise), p));
            }
            r.shuffle(rows);
        }
    }
    if !sc.blank.is_empty() {
        let mut r = Rng::stream(opts.seed, STREAM_BLANK);
        for (rows, header) in [
            (&mut left_rows, LEFT_HEADER),
            (&mut right_rows, RIGHT_HEADER),
        ] {
            for (col, rate) in &sc.blank {
                if let Some(c) = header[1..].iter().position(|h| h == col) {
                    for (row, _) in rows.iter_mut() {
                        if r.chance(*rate) {
                            row.cells[c].clear();
                        }
                    }
                }
            }
        }
    }
    let mut right_of: HashMap<usize, Vec<&str>> = HashMap::new();
    for (row, p) in &right_rows {
        right_of.entry(*p).or_default().push(&row.id);
    }
    let mut truth: Vec<(&str, &str)> = Vec::new();
    for (row, p) in &left_rows {
        for &r in right_of.get(p).map_or(&[][..], |v| &v[..]) {
            truth.push((&row.id, r));
        }
    }
    truth.sort_unstable();
    let mut t = String::from("left_id,right_id\n");
    for (a, b) in &truth {
        t.push_str(&format!("{a},{b}\n"));
    }
    let true_pairs = truth.len();
    let left: Vec<Row> = left_rows.into_iter().map(|r| r.0).collect();
    let right: Vec<Row> = right_rows.into_iter().map(|r| r.0).collect();
    Synthetic {
        left_csv: csv_text(LEFT_HEADER, &left),
        right_csv: csv_text(RIGHT_HEADER, &right),
        truth_csv: t,
        config_toml: CONFIG.to_string(),
        true_pairs,
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

    #[test]
    fn scenario_knobs_do_what_they_say() {
        let o = SynthOptions {
            rows: 2000,
            overlap: 0.5,
            noise: 0.5,
            seed: 9,
            twins: TWIN_CHANCE,
        };
        // Every knob off: the bytes of `generate`.
        let plain = generate(&o);
        let off = generate_scenario(&o, &Scenario::default());
        assert_eq!(plain.right_csv, off.right_csv);
        assert_eq!(plain.truth_csv, off.truth_csv);
        // Duplicates: 5% more rows on each side, and more true pairs than people shared.
        let dup = generate_scenario(
            &o,
            &Scenario {
                duplicates: 0.05,
                ..Scenario::default()
            },
        );
        assert_eq!(dup.left_csv.lines().count(), 2101);
        assert_eq!(dup.right_csv.lines().count(), 2101);
        assert!(
            dup.true_pairs > 1000 && dup.true_pairs < 1120,
            "{}",
            dup.true_pairs
        );
        // A blanked column is empty at about its rate (0.5 of 2000 rows, binomial sd 22).
        let blank = generate_scenario(
            &o,
            &Scenario {
                blank: vec![("dob".into(), 0.5)],
                ..Scenario::default()
            },
        );
        let empty = blank
            .right_csv
            .lines()
            .skip(1)
            .filter(|l| l.split(',').nth(3) == Some(""))
            .count();
        assert!((900..1100).contains(&empty), "{empty}");
        // Movers: with every right person moved, few true pairs keep the left postcode
        // (a new address is the old one by chance only).
        let moved = generate_scenario(
            &o,
            &Scenario {
                movers: Some(1.0),
                ..Scenario::default()
            },
        );
        let postcodes = |csv: &str| -> std::collections::HashMap<String, String> {
            let mut r = csv::Reader::from_reader(csv.as_bytes());
            r.records()
                .filter_map(|x| x.ok())
                .map(|x| (x[0].to_string(), x[7].to_string()))
                .collect()
        };
        let (lp, rp) = (postcodes(&moved.left_csv), postcodes(&moved.right_csv));
        let same = moved
            .truth_csv
            .lines()
            .skip(1)
            .filter_map(|l| l.split_once(','))
            .filter(|(a, b)| !lp[*a].is_empty() && lp[*a] == rp[*b])
            .count();
        assert!(same < 20, "{same}");
        // Relatives: the extra right people become look-alikes of left people; the same-name
        // juniors (a quarter of them) share a left record's given name, surname and postcode,
        // which members of one household never do.
        let rel = generate_scenario(
            &o,
            &Scenario {
                relatives: 1.0,
                ..Scenario::default()
            },
        );
        assert_eq!(rel.true_pairs, plain.true_pairs);
        let shared_keys = |s: &Synthetic| {
            let key = |csv: &str| -> std::collections::HashSet<(String, String, String)> {
                let mut r = csv::Reader::from_reader(csv.as_bytes());
                r.records()
                    .filter_map(|x| x.ok())
                    .map(|x| {
                        (
                            x[1].trim().to_lowercase(),
                            x[2].trim().to_lowercase(),
                            x[7].to_string(),
                        )
                    })
                    .collect()
            };
            let (l, r) = (key(&s.left_csv), key(&s.right_csv));
            r.intersection(&l).count()
        };
        let (a, b) = (shared_keys(&rel), shared_keys(&plain));
        assert!(a > b + 30, "{a} {b}");
    }
}
