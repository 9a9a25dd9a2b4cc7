"""Procedurally generated calibration text for lopper's MiniLM activations.

All text here is invented: sentences are built from our own templates and word
lists with a seeded RNG, so no text is copied from anywhere. Two registers:

  kind "A": maintenance log entries for the irrigation pumps of a fruit farm
            (past tense, technical, numbers with units).
  kind "B": kitchen prep notes for a restaurant line (imperative, terse,
            ingredients, quantities and times).

`sentences(kind, rng)` yields an endless stream of sentences; the caller stops
when it has enough tokens. `python3 scripts/corpora.py` prints a few of each.
"""

import random
import re

# ---------------------------------------------------------------- kind A ----
A_SLOTS = {
    "pump": lambda r: f"Pump {r.randint(1, 14)}",
    "site": ["the north orchard", "the south block", "the cherry terraces", "the lower pear rows",
             "the apple block by the road", "the plum nursery", "the east reservoir",
             "the packing shed well", "the young apricot plot", "the hillside vineyard edge",
             "the peach rows near the dam", "the quince hedge line", "bore 3", "the main header"],
    "when": ["after the night cycle", "during the morning run", "at start-up", "on the second shift",
             "after the frost protection run", "while fertigating", "at the end of the day cycle",
             "during the Sunday flush", "after the power cut", "halfway through the midday block",
             "on the first run of the week", "after rain stopped the schedule"],
    "symptom": ["low outlet pressure", "a rattling noise from the impeller housing",
                "a slow drip at the mechanical seal", "high motor temperature",
                "cavitation at the suction side", "an intermittent pressure drop",
                "air in the suction line", "a tripped overload relay", "uneven flow to the drippers",
                "vibration at the coupling", "a sticky foot valve", "rust on the discharge flange",
                "a whining bearing", "a blocked strainer basket", "short cycling on the float switch",
                "a weak prime after idling", "oil weeping from the gearbox", "a cracked pressure gauge"],
    "action": ["filter replaced", "seal kit fitted", "impeller cleaned and refitted",
               "bearings greased", "coupling realigned", "foot valve freed and flushed",
               "suction line re-primed", "overload relay reset and terminals tightened",
               "strainer basket emptied", "gauge swapped for a spare", "float switch raised by a hand width",
               "gland packing adjusted", "pressure switch recalibrated", "clamp on the suction hose tightened",
               "capacitor replaced", "air release valve cleaned", "drive belt tensioned",
               "non-return valve dismantled and scraped"],
    "person": ["Marta", "Joel", "the night operator", "Tomas", "Priya", "the contractor",
               "Wen", "Ruth", "the farm manager", "Diego", "Ana", "the apprentice"],
    "part": ["mechanical seal", "impeller", "bearing", "pressure switch", "foot valve", "capacitor",
             "coupling insert", "gland packing", "strainer mesh", "float switch", "drive belt",
             "non-return valve", "suction hose"],
    "weekday": ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"],
    "crop": ["apple", "pear", "cherry", "plum", "peach", "apricot", "quince", "nectarine"],
    "lpm": lambda r: f"{r.randint(18, 95)} litres per minute",
    "bar": lambda r: f"{r.randint(8, 55) / 10:.1f} bar",
    "temp": lambda r: f"{r.randint(38, 92)} degrees",
    "amps": lambda r: f"{r.randint(30, 180) / 10:.1f} amps",
    "hours": lambda r: f"{r.randint(120, 9800)} hours",
    "mins": lambda r: f"{r.randint(5, 90)} minutes",
    "n": lambda r: str(r.randint(2, 9)),
}

A_TEMPLATES = [
    "{pump} at {site} showed {symptom} {when}; {action}, flow back to {lpm}.",
    "{pump} at {site}: {symptom} {when}. {action_cap}. Outlet now steady at {bar}.",
    "{when_cap}, {pump} at {site} had {symptom}. {person} reported it; {action}.",
    "{person} checked {pump} {when} and found {symptom}; {action} and the line was tested at {bar}.",
    "Logged {weekday}: {pump} ({site}) running hot, casing at {temp}. {action_cap}.",
    "{pump} drew {amps} {when}, above the usual; {action}, current dropped after {mins}.",
    "Routine check on {pump} at {site}: no faults, pressure {bar}, flow {lpm}.",
    "{pump} reached {hours} on the meter, so the {part} was replaced as scheduled.",
    "Replaced the {part} on {pump} at {site}; old one was worn through. Ran it for {mins} with no leaks.",
    "{symptom_cap} on {pump} again {when}. {action_cap}; keep an eye on it over the {crop} harvest.",
    "{pump} would not start {when}. {person} found a blown fuse; fuse replaced and the pump restarted.",
    "{pump} at {site} was switched off for {mins} to clear {symptom}; {action}.",
    "Flow at {site} fell to {lpm} {when}. Cause traced to {pump}: {symptom}. {action_cap}.",
    "Pressure at the far end of the {crop} rows was only {bar}; {pump} checked, {action}.",
    "{person} swapped {pump} with the spare unit while the {part} is on order.",
    "Ordered a new {part} for {pump}; expected {weekday}. Running on the backup until then.",
    "{pump} sounded rough {when}. Vibration traced to the {part}; {action}.",
    "Night cycle on {site} finished early because {pump} tripped; {action}, cycle rerun at {bar}.",
    "{pump}: {symptom}, {action}, test run {mins}, flow {lpm}, signed off by {person}.",
    "Checked all {n} pumps on the {crop} block {when}; only {pump} needed work ({symptom}).",
    "Wiring box on {pump} was damp {when}; dried out, new gasket fitted, insulation tested fine.",
    "{pump} at {site} primed slowly {when}; {action}. Primed in under {mins} on the retest.",
    "Drippers on the {crop} rows were uneven; {pump} outlet raised to {bar} and flushed for {mins}.",
    "Frost run: {pump} held {bar} all night and delivered {lpm} to {site}.",
    "{person} noted {symptom} on {pump} but had no spare {part}; tagged out until {weekday}.",
    "Found the {part} on {pump} cracked during the {weekday} walk-round; {action}.",
    "{pump} restarted after the power cut with {symptom}; {action} and the timer was reset.",
    "Motor on {pump} at {temp} after {mins} of running; vents cleared of leaves, now runs cooler.",
    "Service done on {pump}: {part} inspected, {action}, hour meter reads {hours}.",
    "{pump} and the booster at {site} both showed {symptom}; {action} on each.",
    "Fertigation tank at {site} ran dry {when}, so {pump} ran without load for {mins}; no damage found.",
    "Suction lift at {site} measured against the spec; {pump} fine at {lpm}.",
    "{person} asked to move the {weekday} service of {pump} forward because of {symptom}.",
    "Leak under the manifold near {pump}; {action}, pressure held at {bar} for {mins}.",
    "{pump} ran {mins} longer than programmed {when}; controller clock was wrong and has been set.",
    "Water at {site} looked cloudy {when}; {pump} stopped, {action}, sample sent for testing.",
]

# ---------------------------------------------------------------- kind B ----
B_SLOTS = {
    "verb": ["Dice", "Slice", "Julienne", "Mince", "Peel", "Blanch", "Roast", "Toast", "Pick",
             "Trim", "Grate", "Zest", "Crush", "Shave", "Segment", "Wash"],
    "veg": ["shallots", "carrots", "celeriac", "fennel", "leeks", "red onions", "garlic", "ginger",
            "parsnips", "beetroot", "courgettes", "spring onions", "chillies", "radishes",
            "butternut squash", "cabbage", "button mushrooms", "kale"],
    "herb": ["parsley", "coriander", "dill", "chives", "tarragon", "mint", "basil", "thyme",
             "sage", "chervil"],
    "protein": ["lamb shoulder", "pork belly", "chicken thighs", "hake fillets", "beef shin",
                "duck legs", "mussels", "tofu", "chickpeas", "halloumi", "mackerel", "short rib"],
    "sauce": ["salsa verde", "romesco", "beurre blanc", "chimichurri", "tahini dressing",
              "brown butter", "gremolata", "pickling liquor", "demi-glace", "aioli", "miso glaze"],
    "dish": ["the Thursday braise", "the lunch special", "table d'hote", "the tasting menu",
             "family meal", "the grain bowl", "the staff curry", "Saturday brunch", "the set menu",
             "the soup of the day", "the banquet order", "the vegan main"],
    "store": ["walk-in shelf 2", "the pass fridge", "the blast chiller", "the dry store",
              "lowboy 3", "the pastry fridge", "the freezer drawer", "the garnish rail"],
    "cook": ["Sam", "Ines", "Kofi", "Lena", "Ravi", "Mo", "the commis", "sous", "the morning cook",
             "pastry", "Hana", "Olu"],
    "cut": ["fine brunoise", "half-moons", "thin rounds", "matchsticks", "rough chunks", "wedges",
            "2 cm dice", "ribbons"],
    "vessel": ["a deep hotel pan", "the rondeau", "a lined tray", "the big stockpot", "deli tubs",
               "a sheet pan", "the combi", "the plancha"],
    "day": ["Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun"],
    "kg": lambda r: f"{r.choice([0.5, 1, 1.5, 2, 3, 4, 5, 6, 8])} kg",
    "g": lambda r: f"{r.randrange(20, 400, 10)} g",
    "litres": lambda r: f"{r.choice([1, 2, 3, 4, 5, 8, 10])} L",
    "oven": lambda r: f"{r.randrange(120, 240, 10)}C",
    "mins": lambda r: f"{r.randrange(5, 95, 5)} min",
    "hrs": lambda r: f"{r.choice([2, 3, 4, 6, 8, 12, 24])} h",
    "covers": lambda r: str(r.randrange(20, 180, 5)),
    "n": lambda r: str(r.randint(2, 12)),
}

B_TEMPLATES = [
    "{verb} {kg} of {veg} for {dish}; hold chilled, label with date.",
    "{verb} {veg} into {cut}, about {kg}. Into {store} by 10.",
    "Braise the {protein} at {oven} for {hrs}, covered. Check tender before service.",
    "Make {litres} of {sauce}. Taste for salt. Tub up, {store}.",
    "Pick {g} of {herb} and {g} of {herb2}; wrap in damp cloth.",
    "{cook}: {verb_lc} the {veg} first, then start the {sauce}.",
    "Low count on {protein} — order for {day}. Use {protein2} if short.",
    "{covers} covers tonight. Double the {sauce}, prep extra {veg}.",
    "Sear {protein} hard, then into {vessel} with stock and {herb}, {oven}, {hrs}.",
    "Blanch {kg} {veg}, shock in ice water, drain well, {store}.",
    "No {herb} delivery today. Swap to {herb2} on {dish}.",
    "Roast {veg} at {oven} for {mins} on {vessel}; cool flat before tubbing.",
    "Brine the {protein} {hrs}, rinse, pat dry, rest uncovered in {store}.",
    "{sauce_cap} split last night — make fresh, whisk in butter slowly, keep warm not hot.",
    "Fry {g} of {veg} till deep golden, drain on paper, salt straight away.",
    "Pickle the {veg}: {litres} liquor, sugar, bay, {hrs} minimum before use.",
    "Portion {protein} at {g} each, {n} per tray, clingfilm, {store}.",
    "{cook} on {dish} today. Mise by 11:30 please.",
    "Toast seeds for {dish}, {mins} at {oven}, shake halfway.",
    "Stock: bones, {veg}, {veg2}, {herb}; simmer {hrs}, skim, strain, chill fast.",
    "Clean down {store} before the {day} delivery; bin anything past date.",
    "Check seasoning on {sauce} — was flat yesterday. More acid.",
    "Thaw {protein} overnight in {store}, not on the bench.",
    "Shave {veg} on the mandoline for the garnish, {g}, hold in ice water.",
    "Allergy table at 8: no nuts, so no {sauce} on their {dish}.",
    "Cure the {protein} with salt, sugar and {herb}, {hrs}, weight on top.",
    "Dough for flatbreads: {kg} flour, rest {hrs}, portion {n} per tub.",
    "Steam {protein} {mins}, flake, mix with {herb} and {sauce}.",
    "{verb} the {veg2} last — it browns. Lemon water if holding.",
    "Soup: sweat {veg} and {veg2}, add {litres} stock, simmer {mins}, blend smooth.",
    "Tray of {veg} in {vessel}, olive oil, thyme, {oven}, until edges catch.",
    "Left from lunch: {g} {protein}, {litres} {sauce}. Use on family meal.",
    "Sharpen knives before {verb_lc} the {veg}. Boards colour-coded please.",
    "Temp check: {store} reading high, move {protein} to {store2} for now.",
    "Glaze {protein} with {sauce} last {mins}, baste twice, rest before slicing.",
    "Order sheet for {day}: {kg} {veg}, {kg2} {veg2}, {n} bunches {herb}.",
]


def _fill(template, slots, rng):
    vals = {}

    def pick(name):
        base = re.sub(r"(_cap|_lc|2)$", "", name)
        src = slots[base]
        v = src(rng) if callable(src) else rng.choice(src)
        if name.endswith("_cap"):
            v = v[0].upper() + v[1:]
        elif name.endswith("_lc"):
            v = v.lower()
        return v

    for name in re.findall(r"\{(\w+)\}", template):
        if name not in vals:
            vals[name] = pick(name)
            for _ in range(20):  # "veg2" should differ from "veg"
                if not (name.endswith("2") and vals[name] == vals.get(name[:-1])):
                    break
                vals[name] = pick(name)
    text = template.format(**vals)
    return text[0].upper() + text[1:]


KINDS = {"A": (A_TEMPLATES, A_SLOTS), "B": (B_TEMPLATES, B_SLOTS)}


def sentences(kind, rng):
    """Endless stream of generated sentences of `kind` ("A" or "B")."""
    templates, slots = KINDS[kind]
    while True:
        yield _fill(rng.choice(templates), slots, rng)


if __name__ == "__main__":
    for kind in "AB":
        g = sentences(kind, random.Random(1))
        print(f"--- kind {kind}")
        for _ in range(8):
            print(next(g))
