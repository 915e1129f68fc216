"""Word lists of the invented demo scenario: drivers' comments on public EV chargers.

Every name here is made up (places, car makes, the operator's app); nothing refers to a
real company or product. Lists are ordered from common to rare: the generator samples
them with Zipf-like weights, so the tail words are rare in the data, as in real text.
Phrases may hold placeholders filled by the generator: {kw} {pct} {dur} {price} {bay} {n}.
A subject ending in "+" is plural (takes "were"/"are").
"""

from __future__ import annotations

# ---- per-topic vocabulary ------------------------------------------------------------------
# subjects: what the comment is about; adj_pos/adj_neg: predicates used with a copula
# ("was fast", "wasn't fast"); vp_pos/vp_neg: verb phrases after the subject; fp_pos/fp_neg:
# first-person clauses ("got 80% in 20 min"); neg_vp_pos/neg_vp_neg: negated verb phrases
# whose meaning is positive ("never got stuck") or negative ("never worked"); terse: topic words
# that say nothing about the feeling (a one-word comment "cable 😡").

TOPICS: dict[str, dict[str, tuple[str, ...]]] = {
    "payment": {
        "subjects": (
            "card reader", "payment", "contactless", "price", "card terminal", "tap to pay",
            "pricing", "tariff", "billing", "receipt", "refund", "idle fee", "connection fee",
            "price per kwh", "chip and pin", "pay screen", "pin pad", "deposit",
            "pre-authorisation", "overstay charge", "surcharge", "invoice",
        ),
        "adj_pos": (
            "cheap", "fair", "reasonable", "clear", "instant", "quick", "simple", "affordable",
            "transparent", "honest", "good value", "competitive", "painless", "upfront",
        ),
        "adj_neg": (
            "expensive", "overpriced", "a rip-off", "pricey", "confusing", "extortionate",
            "steep", "daylight robbery", "hidden", "outrageous", "unclear", "exorbitant",
            "unreadable", "scandalous",
        ),
        "vp_pos": (
            "took my card straight away", "worked first tap", "showed the price upfront",
            "refunded the deposit within a day", "accepted my debit card",
            "charged exactly what it said", "emailed a receipt", "cost about {price}",
            "released the hold quickly",
        ),
        "vp_neg": (
            "declined my card", "kept declining", "charged me twice", "overcharged me",
            "rejected every card", "wouldn't read my card", "took {price} extra",
            "blocked {price} for three days", "double billed me", "ate my deposit",
            "charged {price} for nothing", "timed out mid payment", "billed an idle fee while charging",
        ),
        "fp_pos": (
            "paid with my phone in seconds", "paid {price} for a full charge", "tapped and went",
            "got my refund quickly", "paid less than at home",
        ),
        "fp_neg": (
            "got charged twice", "was billed {price} for {kw} kwh", "tried three cards",
            "still waiting for my refund", "paid {price} and got nothing", "had to call my bank",
            "lost {price} on a failed session",
        ),
        "neg_vp_pos": (
            "never declined", "didn't overcharge", "never had a billing issue", "didn't charge twice",
        ),
        "neg_vp_neg": (
            "never took my card", "didn't accept contactless", "wouldn't take payment",
            "never sent a receipt", "never refunded me",
        ),
        "terse": ("contactless", "card reader", "payment", "price", "tariff", "card", "pricing"),
    },
    "connector_cable": {
        "subjects": (
            "cable", "connector", "plug", "ccs plug", "type 2 socket", "lead", "tethered cable",
            "handle", "latch", "pins+", "holster", "cable lock", "chademo plug", "socket",
            "cable management arm", "strain relief", "connector cap", "cable reel",
        ),
        "adj_pos": (
            "long enough", "clean", "in good shape", "easy to handle", "flexible", "solid",
            "well kept", "light", "sturdy", "tidy", "undamaged", "brand new", "well designed",
        ),
        "adj_neg": (
            "too short", "frayed", "cracked", "damaged", "heavy", "jammed", "filthy", "bent",
            "wet inside", "loose", "melted", "snapped", "corroded", "flimsy", "mangled", "sticky",
        ),
        "vp_pos": (
            "clicked in easily", "reached my port", "released fine", "locked properly",
            "unlocked straight away", "fit perfectly", "came out without a fight",
            "reached round to the back of the car",
        ),
        "vp_neg": (
            "got stuck in the car", "wouldn't release", "kept disconnecting", "wouldn't lock",
            "fell out of the holster", "dragged on the ground", "had bent pins",
            "sparked when i plugged in", "popped out mid charge", "wouldn't reach my port",
        ),
        "fp_pos": (
            "plugged in first time", "got the cable out easily", "reached the port from bay {bay}",
            "had no trouble with the plug",
        ),
        "fp_neg": (
            "couldn't get the cable out", "had to park at an angle to reach", "got my hands covered in grease",
            "spent {dur} trying to unlock the plug", "had to reverse in for the short cable",
            "couldn't push the plug in",
        ),
        "neg_vp_pos": (
            "never got stuck", "didn't jam", "never popped out", "didn't drop out once",
        ),
        "neg_vp_neg": (
            "never locked", "wouldn't come out", "didn't reach", "never clicked in", "wouldn't fit",
        ),
        "terse": ("cable", "connector", "plug", "ccs", "socket", "lead", "latch"),
    },
    "charging_speed": {
        "subjects": (
            "charging", "charge", "speed", "power", "rapid charger", "charge rate", "session",
            "top-up", "output", "ramp up", "charging curve", "power sharing", "kw",
            "rate", "dc charger", "ultra rapid", "booster",
        ),
        "adj_pos": (
            "fast", "quick", "rapid", "steady", "consistent", "speedy", "full power", "blazing",
            "snappy", "swift", "lightning quick", "brisk", "punchy",
        ),
        "adj_neg": (
            "slow", "sluggish", "painfully slow", "throttled", "capped", "erratic", "glacial",
            "pathetic", "weak", "patchy", "laggy", "snail paced", "underpowered",
        ),
        "vp_pos": (
            "hit {kw} kw", "held {kw} kw", "did 10 to 80 in {dur}", "ramped up quickly",
            "added {miles} miles in {dur}", "peaked at {kw} kw", "stayed above {kw} kw",
            "filled the battery before my coffee",
        ),
        "vp_neg": (
            "dropped to {kw} kw", "took {dur}", "took forever", "crawled along",
            "kept stopping", "stopped at {pct}%", "only gave {kw} kw", "never got above {kw} kw",
            "halved when the next car plugged in", "tripped out after {dur}", "dropped out twice",
        ),
        "fp_pos": (
            "got {pct}% in {dur}", "was back on the road in {dur}", "added {miles} miles over a sandwich",
            "saw {kw} kw the whole time",
        ),
        "fp_neg": (
            "waited {dur} for {pct}%", "only got {miles} miles in {dur}", "sat there for {dur}",
            "had to restart the session three times", "was stuck at {kw} kw",
        ),
        "neg_vp_pos": (
            "never dropped below {kw} kw", "didn't throttle", "didn't slow down", "never stalled",
        ),
        "neg_vp_neg": (
            "never reached full power", "didn't go above {kw} kw", "never started charging",
            "didn't charge at all", "wouldn't start",
        ),
        "terse": ("charging", "speed", "{kw} kw", "power", "charge rate", "kw", "rapid charger"),
    },
    "site_amenities": {
        "subjects": (
            "toilets+", "cafe", "coffee", "shop", "lighting", "shelter", "canopy", "parking bays+",
            "site", "location", "seating", "wifi", "bins+", "signage", "access road", "bay markings+",
            "vending machine", "picnic area", "playground", "snack bar", "hand wash", "dog area",
            "footpath", "barrier",
        ),
        "adj_pos": (
            "clean", "open late", "well lit", "nice", "handy", "spacious", "safe at night",
            "lovely", "easy to find", "dry", "welcoming", "peaceful", "convenient", "spotless",
        ),
        "adj_neg": (
            "closed", "dirty", "dark", "icy", "flooded", "unsafe", "hard to find", "cramped",
            "filthy", "locked", "grim", "muddy", "overflowing", "deserted", "creepy", "derelict",
        ),
        "vp_pos": (
            "stayed open till late", "had decent coffee", "kept us dry", "made the wait easy",
            "had clean toilets", "had space for a trailer", "had a dog area for the wait",
        ),
        "vp_neg": (
            "was blocked by petrol cars", "had no shelter", "had no toilets", "shut at {n}pm",
            "had no lights at all", "was full of rubbish", "flooded after the rain",
            "was used as a car park", "had broken glass everywhere",
        ),
        "fp_pos": (
            "grabbed a coffee while waiting", "walked the dog while it charged", "had lunch in the cafe",
            "felt safe at {n}am",
        ),
        "fp_neg": (
            "couldn't find the chargers", "had to wait in the rain", "had nowhere to sit",
            "couldn't get in past the barrier", "got blocked in by a van", "had nowhere to use the loo",
        ),
        "neg_vp_pos": (
            "never felt unsafe", "didn't mind the wait", "never had trouble parking",
        ),
        "neg_vp_neg": (
            "never open", "didn't have toilets", "wasn't signposted", "never gritted",
        ),
        "terse": ("toilets", "cafe", "coffee", "shelter", "lighting", "parking", "shop"),
    },
    "app_account": {
        "subjects": (
            "app", "account", "login", "qr code", "rfid card", "membership", "app update",
            "map", "notifications+", "customer support", "helpline", "status page", "sign-up",
            "password reset", "charge history", "subscription", "chat support", "loyalty points+",
        ),
        "adj_pos": (
            "easy to use", "helpful", "accurate", "simple", "intuitive", "responsive", "reliable",
            "up to date", "clear", "polished", "slick", "handy", "friendly",
        ),
        "adj_neg": (
            "buggy", "useless", "wrong", "confusing", "clunky", "laggy", "unreliable", "outdated",
            "a nightmare", "glitchy", "unhelpful", "broken", "clueless", "half-baked",
        ),
        "vp_pos": (
            "started the session instantly", "showed live status", "sent a receipt",
            "replied within minutes", "unlocked the charger from my phone", "showed the right price",
            "sorted my account in {dur}", "found me a free bay",
        ),
        "vp_neg": (
            "crashed", "kept logging me out", "wouldn't load", "showed available but it wasn't",
            "lost my history", "froze on the start screen", "wants a new password every week",
            "put me on hold for {dur}", "sent me to a dead link", "showed the wrong price",
            "locked my account", "needs an update every visit",
        ),
        "fp_pos": (
            "started it from the app in seconds", "got a refund through chat", "signed up in {dur}",
            "found the station on the map",
        ),
        "fp_neg": (
            "had to reinstall the app", "couldn't log in", "waited {dur} on the helpline",
            "couldn't scan the qr code", "got logged out twice", "couldn't start a session",
            "had no signal for the app",
        ),
        "neg_vp_pos": (
            "never crashed", "didn't lose my session", "never logged me out",
        ),
        "neg_vp_neg": (
            "never started the session", "never replied", "didn't load", "wouldn't let me log in",
            "never showed the right status",
        ),
        "terse": ("app", "login", "account", "support", "qr code", "helpline", "membership"),
    },
}

# ---- sentiment words shared by every topic ---------------------------------------------------

GENERAL_POS = (
    "great", "good", "fine", "excellent", "brilliant", "decent", "smooth", "perfect", "solid",
    "lovely", "superb", "fantastic", "awesome", "spot-on", "faultless", "flawless", "seamless",
    "immaculate", "stellar", "grand", "top notch", "impressive", "champion", "ace", "cracking",
    # the rare tail: words a small training set may never show, which pretrained vectors know
    "marvellous", "wonderful", "terrific", "splendid", "outstanding", "exemplary", "commendable",
    "sublime", "delightful", "magnificent", "phenomenal", "glorious", "admirable", "exceptional",
    "praiseworthy", "dependable", "trustworthy", "effortless", "pleasant", "satisfying", "sterling",
    "first-rate", "exquisite", "heavenly", "marvelous", "peachy", "fab", "nifty", "dandy",
)
GENERAL_NEG = (
    "terrible", "awful", "bad", "useless", "poor", "rubbish", "horrible", "dodgy", "annoying",
    "pathetic", "dreadful", "shocking", "abysmal", "atrocious", "diabolical", "woeful",
    "hopeless", "shambolic", "lousy", "dire", "appalling", "naff", "ropey", "a joke", "a shambles",
    # the rare tail
    "deplorable", "lamentable", "inexcusable", "substandard", "unacceptable", "disgusting",
    "miserable", "horrendous", "unbearable", "infuriating", "maddening", "frustrating", "defective",
    "unusable", "wretched", "grotty", "subpar", "crummy", "farcical", "laughable", "ghastly",
    "dismal", "hideous", "unforgivable", "incompetent", "inadequate", "crap", "pants", "duff",
)
# Predicates with no topic: "didn't work" can be said of a card reader, a plug or an app.
GENERAL_VP_POS = ("worked", "worked fine", "just worked", "did the job", "behaved", "worked perfectly")
GENERAL_VP_NEG = ("didn't work", "never worked", "failed", "broke", "stopped working", "gave up",
                  "was out of order", "was faulty", "errored out", "was dead")
GENERAL_NEG_VP_POS = ("never failed", "didn't let me down", "had no problems", "never gave trouble")

INTENSIFIERS = (
    "very", "really", "so", "super", "extremely", "pretty", "quite", "incredibly", "absolutely",
    "totally", "properly", "ridiculously", "seriously", "unbelievably", "genuinely", "insanely",
    "mega", "well", "dead", "thoroughly",
)
DOWNTONERS = ("a bit", "slightly", "fairly", "somewhat", "a little", "kind of", "rather")

NEG_COPULA_SING = ("wasn't", "isn't", "was not", "is not", "wasn't exactly", "is never", "was hardly",
                   "is far from", "wasn't remotely")
NEG_COPULA_PLUR = ("weren't", "aren't", "were not", "are not", "weren't exactly", "are never", "were hardly")
COPULA_SING = ("was", "is", "was", "is", "has been", "seemed", "felt")
COPULA_PLUR = ("were", "are", "were", "have been", "seemed")

GENERIC_SUBJECTS = ("it", "this one", "the charger", "this charger", "this station", "the unit",
                    "charger {bay}", "bay {bay}", "the post", "the machine", "this site", "everything")

# Closing remarks and emoji carry sentiment but no topic.
CLOSING_POS = (
    "would use again", "recommended", "5 stars", "thanks", "love it", "top marks", "great job",
    "well done", "cheers", "keep it up", "happy driver", "10/10", "no complaints", "will be back",
    "thank you", "job done", "nice one", "highly recommend", "made my day", "kudos to the team",
)
CLOSING_NEG = (
    "never again", "1 star", "avoid", "sort it out", "waste of time", "fix this please",
    "not happy", "disgraceful", "so frustrating", "what a joke", "embarrassing", "zero stars",
    "sort it", "not good enough", "very disappointed", "fuming", "i give up", "lost a customer",
    "shame", "ridiculous",
)
EMOJI_POS = ("👍", "🙂", "😀", "⚡", "👌", "❤️", "🔋", "😊", "🙌", "💚", "🚀", "✅")
EMOJI_NEG = ("👎", "😡", "😤", "🙄", "😞", "💩", "🤬", "😩", "❌", "🐌", "😠", "💸")
EMOJI_NEUTRAL = ("🚗", "🔌", "☕", "🌧️", "🐕", "🕒")

# Sarcastic openers: positive words in a negative comment.
SARCASM = ("great,", "brilliant.", "oh lovely,", "fantastic,", "well done,", "perfect,", "nice one,")

# ---- invented places, makes and context -------------------------------------------------------

PLACE_HEADS = (
    "zel", "quor", "vask", "drell", "ombr", "tiv", "harn", "pell", "yarr", "skel", "brim",
    "coth", "fald", "gwen", "hask", "jorv", "kell", "lumb", "morr", "nesk", "orrin", "prax",
    "rudd", "sarn", "thol", "ulv", "vell", "wyth", "xen", "yeld", "zorn", "aber", "brann",
)
PLACE_TAILS = (
    "mere", "wick", "holm", "stead", "ford", "by", "thorpe", "garth", "combe", "ley", "wold",
    "haven", "moor", "dale", "brook", "cross",
)
SITE_KINDS = (
    "retail park", "services", "leisure centre", "park and ride", "hotel car park", "village hall",
    "ferry terminal", "garden centre", "rugby club", "business park", "supermarket car park",
    "marina", "industrial estate", "hospital car park", "market square", "farm shop", "golf club",
    "train station", "library car park", "crematorium", "ski slope", "community centre",
)
CAR_MAKES = ("torvel", "azuri", "kestra", "novane", "pellix", "qarro", "ventik", "olmera", "zephra",
             "brisko", "halden", "corvane", "mirelle", "strabo")
CAR_CODE_LETTERS = "kqvtzrs"
PURPOSES = (
    "work", "the coast", "my mum's", "the airport", "school pickup", "the vet", "football practice",
    "a wedding", "the hospital", "a funeral", "the match", "my daughter's", "a job interview",
    "the ferry", "the hills", "a concert", "the dentist", "swimming lessons", "a delivery run",
    "the allotment", "a camping trip", "night shift", "the caravan site", "my grandkids",
    "a stag do", "the garden show", "the tip",
)
WHEN = (
    "this morning", "tonight", "yesterday", "on sunday", "at 2am", "in the rain", "in the snow",
    "on a bank holiday", "during rush hour", "at lunchtime", "last week", "on christmas eve",
    "in a heatwave", "after midnight", "on a busy saturday", "at dawn", "in thick fog",
)
WITH = ("with the kids", "with the dog", "with a full car", "on my own", "with my dad",
        "towing a trailer", "with a flat phone", "with two toddlers", "with the in-laws")
# Everyday things drivers mention in passing (neutral, a long tail of real words).
ITEMS = (
    "umbrella", "sandwich", "phone", "keys", "dog", "pushchair", "laptop", "flask", "sunglasses",
    "jacket", "wallet", "shopping", "bike rack", "roof box", "caravan", "trailer", "kayak",
    "surfboard", "toolbox", "groceries", "wheelchair", "golf clubs", "suitcase", "parcel",
    "birthday cake", "houseplant", "guitar", "puppy", "hamster", "blanket", "thermos", "crisps",
    "newspaper", "audiobook", "podcast", "crossword", "knitting", "paperback", "headphones",
    "charging card", "tyre gauge", "scraper", "de-icer", "wellies", "raincoat", "picnic",
)
WEATHER = (
    "drizzle", "sleet", "hail", "gale", "fog", "frost", "sunshine", "heat", "downpour", "blizzard",
    "thunderstorm", "mist", "wind", "puddles", "black ice", "slush",
)
FILLER = (
    "second visit this week", "first time here", "regular user", "long trip today",
    "new to electric", "used it {n} times", "on a road trip", "only charger for miles",
    "passing through", "daily commute", "company car", "on the way home", "long queue as usual",
    "three cars waiting", "first charge of the day", "been coming here for years",
)

KW_VALUES = (50, 150, 22, 7, 100, 43, 62, 120, 175, 350, 11, 250, 300, 75, 3, 18, 36, 200, 90, 125)
DURATIONS = ("20 min", "25 minutes", "an hour", "40 mins", "2 hours", "half an hour", "15 minutes",
             "45 min", "90 minutes", "3 hours", "10 mins", "35 min", "55 minutes", "4 hrs")

# Near keys on a common keyboard layout, for substitution typos.
KEY_NEIGHBOURS = {
    "a": "qwsz", "b": "vghn", "c": "xdfv", "d": "serfcx", "e": "wsdr", "f": "drtgvc", "g": "ftyhbv",
    "h": "gyujnb", "i": "ujko", "j": "huikmn", "k": "jiolm", "l": "kop", "m": "njk", "n": "bhjm",
    "o": "iklp", "p": "ol", "q": "wa", "r": "edft", "s": "awedxz", "t": "rfgy", "u": "yhji",
    "v": "cfgb", "w": "qase", "x": "zsdc", "y": "tghu", "z": "asx",
}
