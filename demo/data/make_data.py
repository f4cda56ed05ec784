#!/usr/bin/env python3
"""Writes the labelled demo messages of Ridgeline Cycle Works, an invented regional chain of
bicycle repair shops, as three JSONL files of {"text": ..., "label": ...} lines:

- routing.jsonl: which desk a message goes to (repairs, sales, rentals, warranty, billing);
- urgency.jsonl: how soon someone must answer (low, normal, urgent);
- sentiment.jsonl: how the customer feels (negative, neutral, positive);
- routing-traffic.jsonl: 100 more routing messages, none of them in routing.jsonl, that the
  demo tour sends through its A/B split as a day's traffic.

Every message is built from hand-written templates with slots (bikes, parts, shops, days,
amounts), an optional greeting and an optional sign-off. Each label has many templates of
different shapes, and the slot words are shared across labels (a billing message talks about a
repair, a warranty message about a purchase), so no single word decides a label. The output is
deterministic: the same script always writes the same files. Run it from anywhere:

    python3 demo/data/make_data.py
"""

import json
import random
from pathlib import Path

HERE = Path(__file__).resolve().parent
PER_LABEL = {"routing": 60, "urgency": 100, "sentiment": 100}

SLOTS = {
    "bike": ["road bike", "gravel bike", "commuter", "e-bike", "mountain bike", "kids' bike",
             "cargo bike", "folding bike", "tandem", "hybrid", "fixie", "touring bike"],
    "part": ["rear derailleur", "front brake", "back wheel", "chain", "bottom bracket",
             "headset", "disc brakes", "shifter", "crankset", "rear hub", "fork", "saddle",
             "seat post", "front wheel", "cassette", "brake levers"],
    "problem": ["makes a clicking noise", "keeps skipping gears", "squeals when I stop",
                "feels loose", "won't shift into the big ring", "has a wobble",
                "rubs on every turn", "grinds on climbs", "slips under load",
                "creaks when I stand up", "doesn't hold air", "drags a bit"],
    "shop": ["Elm Street", "Harbor Road", "Millbrook", "Cedar Flats", "Quarry Lane",
             "Northgate", "the riverside shop", "the downtown shop"],
    "day": ["Saturday", "Monday", "Tuesday morning", "Thursday", "this weekend",
            "Friday afternoon", "next Wednesday", "Sunday"],
    "amount": ["$42.50", "$118", "$64", "$230", "$19.99", "$87.40", "$310", "$55"],
    "order": ["order 4471", "invoice 20-318", "ticket 8812", "order 5093", "invoice 11-042",
              "work order 7730", "receipt 3391"],
    "when": ["last week", "two weeks ago", "in March", "a month ago", "on Saturday",
             "yesterday", "back in the spring", "last Tuesday"],
    "name": ["Sam", "Priya", "Tomas", "Jo", "Marguerite", "Dev", "Alex", "Keiko", "Ben",
             "Rosa", "Owen", "Lena"],
    "service": ["a tune-up", "a full service", "a brake bleed", "new cables", "a wheel true",
                "a chain and cassette swap", "a bike fit", "a safety check"],
    "length": ["a day", "the weekend", "three days", "a week", "two hours", "the afternoon"],
    "group": ["two adults and a kid", "a group of six", "my partner and me", "four of us",
              "our family", "a team of eight"],
    "product": ["helmet", "set of lights", "pair of clipless pedals", "rear rack",
                "frame bag", "bike computer", "child seat", "lock", "pair of gloves",
                "tubeless kit"],
}

GREETINGS = ["", "", "", "Hi! ", "Hello. ", "Hey there. ", "Good morning. ", "Hi team! ",
             "Hello Ridgeline. ", "Quick question: "]
SIGNOFFS = ["", "", "", " Thanks!", " Thank you.", " Cheers, {name}", " - {name}",
            " Thanks in advance.", " Let me know."]

ROUTING = {
    "repairs": [
        "My {part} {problem}. Can someone take a look {day}?",
        "Could I book {service} for my {bike} at {shop}?",
        "The {part} on my {bike} {problem} since {when}, what would it cost to fix?",
        "Do you have a slot {day} to sort out a {part} that {problem}?",
        "I dropped my {bike} off at {shop} {when}, is the {part} fixed yet?",
        "Is it worth repairing a {part} that {problem}, or should I just replace it?",
        "How long does {service} usually take at {shop}?",
        "Can you fit new brake pads and true the {part} while you're at it?",
        "My kid's chain came off and now the {part} {problem}. Can you fix it {day}?",
        "Need {service} before a long ride, any openings at {shop} {day}?",
        "What's the wait at {shop} for {service} right now?",
        "The {part} I had replaced with you {when} {problem} again. Can you have another look?",
    ],
    "sales": [
        "Do you have the {bike} in a medium frame at {shop}?",
        "I'm looking for a {bike} under $1500, what would you suggest?",
        "Can I test ride a {bike} at {shop} {day}?",
        "Is the {product} on your website in stock, or can I order it in?",
        "Do you sell a {product} that fits a {bike}?",
        "What's the price difference between the two {bike} models in the window at {shop}?",
        "Thinking about trading in my old {bike} for a new one, do you do that?",
        "Could you hold a {product} for me until {day}?",
        "Does the new {bike} come with pedals, or do I buy those separately?",
        "My {part} is worn out, do you stock a replacement I can fit myself?",
        "Are the {bike}s going on sale any time soon?",
        "I want to buy a {product} as a gift, do you do gift wrapping?",
    ],
    "rentals": [
        "Can I rent a {bike} for {length} starting {day}?",
        "We're {group} and want to hire bikes for {length}, what's available at {shop}?",
        "How much is it to rent a {bike} for {length}?",
        "Do your rental bikes come with a {product}?",
        "I'd like to extend my {bike} rental by {length}, is that possible?",
        "Can I pick up a rental {bike} at {shop} and drop it at another shop?",
        "Do you rent {bike}s to under 16s, and do they need an adult with them?",
        "Is there a deposit to hire a {bike} for {length}?",
        "Booking hire bikes for {group} {day}, do we need to reserve ahead?",
        "The rental {bike} I picked up {when} has a {part} that {problem}, can I swap it?",
        "What time do I need to return a rental taken out {day} morning?",
        "Do you have a {bike} to rent while mine is in for {service}?",
    ],
    "warranty": [
        "The {part} on the {bike} I bought from you {when} {problem}. Is that covered?",
        "My frame has a crack near the {part} and the bike is only a year old. What are my options?",
        "Is the {part} covered by the manufacturer if it fails after eight months?",
        "I bought a {product} at {shop} {when} and it broke already. Can it be replaced under guarantee?",
        "Does the guarantee on my {bike} still apply if I had {service} elsewhere?",
        "What do I need to bring to make a claim on a faulty {part}?",
        "The battery on my e-bike holds half the charge it did when new. Is that a defect you'll cover?",
        "You replaced my {part} under guarantee {when} and the new one {problem} too.",
        "How long is the frame guarantee on a {bike} from your shop?",
        "My {part} snapped on a normal ride, the bike is from {shop}, will the maker replace it?",
        "Is paint bubbling on a six-month-old {bike} something the guarantee covers?",
        "I still have the receipt for my {bike} from {when}. The {part} {problem}, can you send it back to the maker?",
    ],
    "billing": [
        "I was charged {amount} twice for {order}, can you refund one of them?",
        "Could you email me a copy of {order}? I need it for my expenses.",
        "The quote for {service} was lower than the {amount} I paid. Why the difference?",
        "My card was charged {amount} but I never picked up the {product}.",
        "Can I pay for {order} in two instalments?",
        "I returned a {product} {when} and still haven't seen the refund.",
        "Why is there a {amount} fee on my rental deposit statement?",
        "Do you accept payment by bank transfer for {service}?",
        "The total on {order} doesn't match the parts list. Can someone check it?",
        "I'd like a receipt with your tax number for the {bike} I bought {when}.",
        "Is there a discount for club members on {service}? I was billed full price.",
        "The refund for {order} went to a card I no longer have. How do I get it?",
    ],
}

URGENCY = {
    "urgent": [
        "My {part} failed halfway down a hill and I'm stuck near {shop}. Can anyone help right now?",
        "I have a race tomorrow morning and my {part} {problem}. Can you fit me in today?",
        "Please call me back as soon as possible, the {bike} you serviced lost its brakes on the way home.",
        "My only way to work is this {bike} and the {part} just snapped. Can you see it before you close tonight?",
        "Stranded with a broken {part} on the trail behind {shop}, is there any way to get a pickup?",
        "The rental {bike} was stolen from outside the station an hour ago, what do I do?",
        "I leave for a tour at 6 am tomorrow and the {part} {problem}. Anything you can do tonight?",
        "Brakes on my kid's bike gave out this afternoon, I need it safe before school tomorrow.",
        "Someone charged {amount} to my card for an order I never made, please stop it today.",
        "Your mechanic left my {part} loose and it came off while riding. I need this sorted immediately.",
        "The e-bike battery started smoking while charging. What should I do right now?",
        "I'm at {shop} and it's closed but my booking for {service} is now. Is anyone there?",
    ],
    "normal": [
        "Could I book {service} for my {bike} {day}?",
        "My {part} {problem}, when's your next free slot?",
        "What does {service} cost at {shop}?",
        "Can I rent a {bike} for {length} {day}?",
        "I was charged {amount} for {order}, could you send me an itemised receipt?",
        "Do you have a {product} that fits a {bike} in stock?",
        "Is my {bike} ready to collect from {shop} yet?",
        "Could someone check whether the {part} is covered by the guarantee?",
        "I'd like a quote for {service} and a new {part}.",
        "Can I move my {service} booking from {day} to later in the week?",
        "The {part} I bought {when} {problem}, can I bring it in?",
        "How long will {service} take if I drop the bike off {day}?",
    ],
    "low": [
        "No rush at all, but at some point I'd like {service} for my {bike}.",
        "Just curious whether you ever stock a {product} for a {bike}. Whenever you get a chance.",
        "Not urgent: could you let me know next month what {service} would cost?",
        "When you have a quiet moment, could you tell me if {shop} does bike fits?",
        "I'm planning ahead for the spring, do you rent {bike}s for {length}?",
        "Whenever it suits, could you send me the receipt for {order}? No hurry.",
        "Someday I'd like to upgrade the {part} on my {bike}, any thoughts for later?",
        "The {part} {problem} a little, but it's fine for now. Maybe I'll book something in a few weeks.",
        "Out of interest, do you run maintenance classes at {shop}? Just thinking about it for the autumn.",
        "Nothing pressing, I just wanted to say the {service} {when} was good and ask about winter hours.",
        "Thinking of buying a {bike} next year, could you send a price list whenever?",
        "Low priority: does the guarantee on a {product} transfer if I sell the bike eventually?",
    ],
}

SENTIMENT = {
    "negative": [
        "I paid {amount} for {service} and the {part} {problem} worse than before. Really disappointed.",
        "Third time I've brought my {bike} back to {shop} and it's still not right. This is frustrating.",
        "Nobody answered the phone at {shop} all {day} and my booking was lost. Not impressed.",
        "The rental {bike} was filthy and the {part} {problem}. It ruined our day out.",
        "I was told the {bike} would be ready {day} and it wasn't even started. Terrible service.",
        "Charged {amount} for {order} with no explanation. I feel ripped off.",
        "Your mechanic scratched my frame and nobody apologised. I won't be back.",
        "The {product} I bought fell apart within a week. What a waste of money.",
        "Waited forty minutes at {shop} to be told you couldn't do {service} after all. Awful.",
        "I'm annoyed that my guarantee claim for the {part} was turned down without anyone looking at it.",
        "The staff at {shop} were rude when I asked about {order}. Very unhappy.",
        "After {service} the {part} {problem}. I expected much better for the price.",
    ],
    "neutral": [
        "What are the opening hours at {shop} {day}?",
        "Can I book {service} for my {bike}?",
        "Do you have a {product} that fits a {bike}?",
        "How much is it to rent a {bike} for {length}?",
        "Please send a copy of {order} to this address.",
        "Is the {part} covered under the guarantee after a year?",
        "My {part} {problem}. When could someone look at it?",
        "I dropped off my {bike} at {shop} {when}. Is it ready?",
        "Could you tell me the price of {service} and a new {part}?",
        "Do you take card payments at {shop}?",
        "I'd like to change my rental from {day} to the following week.",
        "Which of your shops is closest to the train station?",
    ],
    "positive": [
        "Huge thanks to the team at {shop}, my {bike} rides like new after {service}.",
        "Just wanted to say the {part} you fitted {when} is perfect. Brilliant work.",
        "We rented bikes for {group} {when} and had a fantastic day. Thank you!",
        "The mechanic at {shop} explained everything so clearly. Really appreciate it.",
        "Love the {product} I bought from you, best purchase this year.",
        "You sorted my guarantee claim for the {part} in a day. Amazing service.",
        "So pleased with {service}, the {bike} has never shifted this smoothly.",
        "Friendly staff, fair price for {service}, and done early. I'll definitely be back.",
        "My kid adores the {bike} we picked up at {shop}. Thanks for the great advice.",
        "The refund for {order} came through quickly, thanks for being so easy to deal with.",
        "Fixed my {part} while I waited at {shop}. Couldn't be happier.",
        "Really impressed by how you handled {order}. Great experience start to finish.",
    ],
}


def fill(template, rng):
    out = template
    for key, values in SLOTS.items():
        while "{" + key + "}" in out:
            out = out.replace("{" + key + "}", rng.choice(values), 1)
    return out


def message(template, rng):
    greeting = rng.choice(GREETINGS)
    body = fill(template, rng)
    if greeting.endswith(": ") and not body.startswith("I "):
        body = body[0].lower() + body[1:]
    signoff = fill(rng.choice(SIGNOFFS), rng)
    text = greeting + body + signoff
    if rng.random() < 0.15:
        text = text.lower()
    return text


def make(task, templates, seed, per_label=None, name=None, exclude=()):
    """Writes `name` (default: `task`).jsonl and returns the set of texts written; texts in
    `exclude` are never written, so a traffic file shares no message with the training file."""
    rng = random.Random(seed)
    per_label = per_label or PER_LABEL[task]
    rows = []
    seen = set(exclude)
    for label, ts in templates.items():
        made = 0
        attempts = 0
        while made < per_label:
            attempts += 1
            assert attempts < per_label * 200, f"{task}/{label}: too few distinct messages"
            # Cycle through the templates so each label uses all of them evenly.
            text = message(ts[made % len(ts)], rng)
            if text in seen:
                continue
            seen.add(text)
            rows.append({"text": text, "label": label})
            made += 1
    rng.shuffle(rows)
    path = HERE / f"{name or task}.jsonl"
    with path.open("w", encoding="utf-8") as f:
        for row in rows:
            f.write(json.dumps(row, ensure_ascii=False) + "\n")
    print(f"wrote {path.relative_to(HERE.parent.parent)}: {len(rows)} messages, "
          f"{per_label} per label ({', '.join(templates)})")
    return {row["text"] for row in rows}


if __name__ == "__main__":
    routing = make("routing", ROUTING, 11)
    make("urgency", URGENCY, 12)
    make("sentiment", SENTIMENT, 13)
    # A day's traffic for the demo tour's A/B split: new routing messages that neither routing
    # adapter trained on (nor held out), so the split compares the versions on unseen mail.
    make("routing", ROUTING, 21, per_label=20, name="routing-traffic", exclude=routing)
