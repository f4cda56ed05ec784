#!/usr/bin/env python3
"""Writes the labelled demo messages of Ridgeline Cycle Works, an invented regional chain of
bicycle repair shops, as five JSONL files of {"text": ..., "label": ...} lines:

- routing.jsonl: which desk a message goes to (repairs, sales, rentals, warranty, billing);
- urgency.jsonl: how soon someone must answer (low, normal, urgent);
- sentiment.jsonl: how the customer feels (negative, neutral, positive);
- routing-traffic.jsonl: 240 more routing messages in shapes routing.jsonl does not have
  (longer, mixed topics with one clear desk, indirect wording), that the demo tour sends through
  its A/B split as a day's traffic; no training file holds any of them;
- routing-more.jsonl: 300 routing messages of the same kind as the traffic but other sentences,
  the second batch the retrained routing adapter trains on (scripts/train-demo-adapters), so
  that the new version is better than the old on the traffic.

The committed routing, urgency and sentiment adapters were trained on the first three files:
changes here must leave them byte for byte as they are (check `git diff --stat` after a run).

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
    # Only the traffic and routing-more templates below name the slots from here on. The
    # templates of the three training files never do, so those files draw the same random
    # numbers as before and stay byte for byte what the committed adapters trained on.
    "person": ["My brother", "A neighbour", "My flatmate", "A friend from work", "My daughter",
               "My dad"],
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


# Routing messages in the shapes real mail takes and the twelve templates per desk above do not:
# longer messages, several topics with one clear desk, indirect wording, other vocabulary
# ("borrow one of yours", "bank statement", "who stands behind that"), and terse fragments. Each
# still has one desk a person at the front counter would pick without hesitating.
#
# ROUTING_TRAFFIC is the demo tour's day of traffic. ROUTING_MORE is the second batch of
# training messages of the retrained routing adapter: its first ten templates per desk say what
# the first ten traffic templates say in other sentences (the same kind of mail, no shared text),
# its last two are shapes of their own, and the last two traffic templates per desk have no
# counterpart in it, so the traffic also holds shapes that no version trained on.
ROUTING_TRAFFIC = {
    "repairs": [
        "Long story short: I took a corner too fast on the way back from {shop} {when}, and ever since the {part} {problem}. Totally my own doing, I'm not asking anyone else to pay for it. Could one of your mechanics get it rideable again?",
        "{person} borrowed my {bike} for a week and gave it back with a {part} that {problem}. I'd like it put right before I ride to work again. What does the workshop need from me?",
        "Not sure who to ask. There's a noise from somewhere near the {part} whenever I pedal hard, and the gears jump around too. Happy to pay whatever the labour is, I just want it sorted.",
        "puncture again, third one this month on the same wheel. can someone find out what keeps causing it and deal with it?",
        "We have a club sportive {day} and my {bike} hasn't been looked at since {when}. Could it get a once-over from the workshop beforehand? Pads, cables, whatever it needs.",
        "I bought the {bike} somewhere else years ago, so you have no paperwork for it and it's well out of any warranty. The {part} {problem}. Can you get it working properly again?",
        "The shifting on my {bike} has gone vague and the chain rattles over bumps. Is this an adjustment job or are parts worn? I'd like a mechanic's opinion and the work done if it's sensible.",
        "I'm no mechanic and I've made it worse: I tried to adjust the {part} myself from a video and now it {problem}. Can your workshop undo the damage {day}?",
        "My {bike} is due its yearly once-over. It also has a slow leak in the back tyre and the light bracket rattles loose. Could I leave it at {shop} {day} and collect it the same evening?",
        "Front wheel's buckled after a pothole. Can it be straightened or does it need rebuilding? Either way I'd like it done this week.",
        "Every time I brake hard the whole front end shudders. Could be the headset, could be the brakes, I honestly don't know. Can somebody work out what it is and fix it?",
        "I'm getting my late dad's old {bike} back on the road: seized chain, perished tyres, rusted cables. Could your workshop bring it back to life? Tell me what it would take.",
    ],
    "sales": [
        "My daughter has outgrown her {bike} and wants something she can ride to secondary school. What do you carry for a twelve-year-old, and could we come and look {day}?",
        "Commuting fifteen kilometres a day on a borrowed bike isn't working any more. I'd like one of my own, budget around $900, mostly flat roads with a bit of gravel. What would you point me towards?",
        "Is the {product} you had on display at {shop} {when} still there? I'd like to take one home.",
        "price on the {product}? and do you carry spares for it",
        "I've hired from you every summer and I think it's time to own a {bike}. Which of the ones in your showroom rides most like the hire fleet?",
        "After your mechanics said my old frame isn't worth saving, I'm in the market for a replacement {bike}. Do you have anything in a large?",
        "I'm after a {product} and would like to compare a few brands in person before choosing. Do you carry more than one?",
        "Looking to move up from rim brakes to a {bike} with hydraulic discs. What's the cheapest model you'd actually recommend, and is anything new coming in next month?",
        "Gift idea needed: my partner rides a {bike} to work every day. Anything around $60 on your accessories wall you'd suggest?",
        "Is there a model you'd suggest for carrying two kids and the weekly shop? We're seriously considering a {bike} instead of a second car.",
        "What sizes do you stock the new {bike} in, and is there a colour other than grey?",
        "Do you price match? I saw the same {product} online for less but I'd rather get it from a local shop.",
    ],
    "rentals": [
        "{person} is staying with us for {length} from {day} and has no bike here. Could they use one of yours for the visit? Paid of course.",
        "We're doing the lake loop with {group} {day} and none of us own bikes that would manage it. What would it take to get everyone on one of yours for {length}?",
        "Is the fleet at {shop} all {bike}s, or could I take out something with a child seat for {length}?",
        "Bringing the hired bikes back late, traffic on the coast road. Is it ok if we return them in an hour or so?",
        "Our office is having an away day {day} and we'd like {group} on bikes for {length}. Can you supply them for the day and drop them at our building?",
        "Tourists here for {length}, no bikes of our own. Can we just show up at {shop} {day} or should we reserve?",
        "The e-bike we took out this morning has a flat battery already. Can we swap it at {shop} for another one before the afternoon?",
        "what's the youngest age you'll let take a bike out on their own? planning a family trip {day}.",
        "I'd like one of your tandems for {length} as an anniversary surprise. Do I need to leave ID or a card as security?",
        "We loved the bikes we had from you {when}. Could we have the same two again {day}, for {length} this time?",
        "Do you do multi-day hire with panniers for a touring trip? Looking at five days along the valley starting {day}.",
        "Is it cheaper per day if we keep the bikes for {length} instead of a single day? Trying to plan a holiday budget.",
    ],
    "warranty": [
        "Less than a year after buying my {bike} from {shop}, the {part} {problem}. I've ridden it gently, no crashes. I assume that's a manufacturing fault, so what's the process for getting the maker to replace it?",
        "The frame on my {bike} has a hairline crack by one of the welds. It was bought new from you {when}. Surely that shouldn't happen; who stands behind that?",
        "I was told when I bought it that the {product} would last for years. It failed after four months of normal use. Will the brand swap it?",
        "Do I need to register my new {bike} with the manufacturer for the lifetime frame promise to count, or does your receipt do?",
        "The paint is flaking off the fork of a bike I bought from you in the spring. That's not wear and tear, is it? What can be done under the maker's terms?",
        "The motor on my e-bike cuts out at random. Bought it new from you fourteen months ago. Is that still within the two-year cover, and would the brand handle it?",
        "My {part} cracked while the bike was parked in the garage; it has barely been ridden. I'd like it replaced free as a defect, not repaired at my cost.",
        "I'm the second owner of a {bike} you sold new last year. Does the manufacturer's cover pass to me if I have the original receipt?",
        "The tyres that came on my new {bike} are already cracking along the sidewall after two months. Is that a faulty batch?",
        "Just checking before I file anything: if the {part} is defective, does the claim go through you or straight to the manufacturer?",
        "The {product} I bought from you stopped charging within weeks. The box says two-year guarantee, how do I use it?",
        "Spokes keep snapping on the wheels that came with my bike, and it's only months old. That looks like a fault in the factory wheel build to me. Will the brand replace the wheels?",
    ],
    "billing": [
        "Looking at my bank statement, there's a payment of {amount} to Ridgeline Cycle Works that I can't match to anything. Could you tell me what it was for?",
        "My company pays back bike maintenance but needs an itemised invoice that shows the tax. Could you resend the paperwork for {service} on my {bike}?",
        "The mechanic gave me one price and then I was asked for {amount} at the counter. Not angry, I'd just like the breakdown of what the extra covered.",
        "I cancelled my {bike} hire for {day} but the deposit hasn't come back to my card yet. When should I expect it?",
        "I paid cash for {order} and lost the slip. Could you send me proof of payment?",
        "Can the remaining balance on {order} go on a different card? The one I used is maxed out.",
        "Did my payment for {service} go through? The card machine at {shop} showed an error and I'm not sure whether I was debited.",
        "Your online checkout took {amount} but the confirmation email never arrived, and my bank shows it twice as pending.",
        "Who should I talk to about the amount on {order}? The labour line looks like it's been entered twice.",
        "I'm a club member and the 10% off wasn't applied when I paid for my {product}. Can you credit the difference back?",
        "Please update the billing address on my account; the invoices still go to my old flat.",
        "Could {order} be split into two invoices, one for the parts and one for the labour? My accountant asks for it that way.",
    ],
}

ROUTING_MORE = {
    "repairs": [
        "Had a small spill on the gravel {when} and now the {part} {problem}. No one else to blame, I just need it fixed. When could the workshop see it?",
        "{person} used my {bike} for a few days and it came back with a {part} that {problem}. Could your mechanics sort it out {day}?",
        "There's a creak I can't pin down, maybe the {part}, maybe the pedals. Could a mechanic track it down and deal with it {day}?",
        "flat tyre on the way in this morning, can you fix it at {shop} today? i'll leave the bike by the door",
        "Riding a hundred-kilometre charity event {day} and my {bike} hasn't had any attention since {when}. Could the workshop check it over and replace whatever is worn?",
        "I got the {bike} second-hand from a stranger, so there's no cover of any kind on it. The {part} {problem}. What would your workshop need to do to sort it?",
        "The gears slip whenever I climb out of the saddle. I've tried the barrel adjuster and it didn't help. Could you have a look and fix whatever's worn?",
        "A friend tried to help by tightening the {part} and now it {problem}. Could your workshop put it right {day}?",
        "Before a week of touring I'd like the {bike} checked over properly: wheels, brakes, cables, the lot. Any time at {shop} before {day}?",
        "My back wheel is bent after I clipped a kerb. Can your workshop true it, or will it need a new rim? I'd like it back on the road soon.",
        "My e-bike's display shows an error and the assist won't come on since I cleaned it with a pressure washer (I know, I know). Can your workshop dry it out and get it going?",
        "Everything on my {bike} rattles over cobbles: mudguards, rack, chain. Could the workshop tighten it all up and tell me if anything's worn?",
    ],
    "sales": [
        "My son starts cycling to school next term and needs his first proper bike. What do you have for a ten-year-old, and can he try a couple at {shop} {day}?",
        "I've ridden an old hand-me-down for years and want something new for the commute, around $1200, a few hills. What should I be looking at?",
        "Is the {bike} in the window at {shop} still for sale? I'd like to come in and take it home {day}.",
        "how much is the {product}? and do you have it at {shop}",
        "We've hired your bikes on holiday for years and finally want to own a couple. Which models would you recommend for a family?",
        "Your workshop told me the frame on my old {bike} is beyond saving, so I need a new bike. What have you got in a medium?",
        "I want a {product} but would like to see a few makes side by side first. Is there more than one in the shop?",
        "I'm ready to move up from my entry-level {bike} to something lighter. What's in the showroom right now, and is anything new arriving soon?",
        "Looking for a birthday present for a friend who rides every weekend, something from your accessories around $50?",
        "Thinking of replacing the family car with a {bike}. Which one would you recommend for two small children and the shopping?",
        "Do you sell second-hand bikes as well as new ones? Looking for something cheap for the ride to the station.",
        "Could you order in the {product} in a larger size? The one at {shop} doesn't fit and I'd like to buy it.",
    ],
    "rentals": [
        "My parents are visiting for {length} from {day} and would love to cycle along the river. Could they take out two of your bikes while they're here?",
        "Organising a day out for {group}, none of whom own a bike. Could we have bikes for everyone from {shop} for {length}?",
        "Is there anything in your hire fleet with a trailer or a child seat for {length}?",
        "Running late with the bikes we hired this morning, stuck behind roadworks. Is it ok if we're an hour over?",
        "Could we have bikes for a staff team-building ride {day}, {group}, for {length}? Can you bring them to our office?",
        "Visiting the area for {length} and would like to get around by bike. Do we need to book ahead at {shop} or can we just turn up {day}?",
        "The e-bike we picked up from you an hour ago keeps cutting out. Could we exchange it for another at {shop}?",
        "How old does someone have to be to take one of your bikes out without a parent? We're planning a trip {day}.",
        "I'd like to hire a tandem for {length} as a birthday surprise. What do I need to bring to collect it?",
        "We had your {bike}s {when} and loved them. Can we book the same again {day} for {length}?",
        "Can I take out one of your cargo bikes for {length} to move a few boxes across town?",
        "Do your hire bikes come with a lock and a helmet, or are those extra for {length}?",
    ],
    "warranty": [
        "The {part} on the {bike} I bought new from {shop} {when} {problem}, and I've only ridden it on the road. That sounds like a manufacturing fault to me. How do I get the maker to replace it?",
        "Found a small crack in the frame near the bottom bracket of my {bike}, bought new from you {when}. Who is responsible for that?",
        "The {product} from your shop was meant to last for years and died after three months of normal use. Can the brand exchange it?",
        "Is there anything I need to register with the maker so the frame cover on my new {bike} counts, or is your receipt enough?",
        "Bubbles are appearing under the paint on the top tube of a bike I bought from you this year. Is that the manufacturer's problem?",
        "My e-bike's motor makes a grinding noise and it's eighteen months old, bought from you. Would that be handled under the brand's two-year cover?",
        "The {part} split while the bike was standing in the hallway. It's nearly new, so I'd expect a free replacement since it's clearly defective.",
        "I bought a used {bike} that you sold new last year. Does the manufacturer's cover still apply for me as the new owner?",
        "The tyres on my new {bike} have split along the sidewalls after a few weeks. Is that a faulty batch the maker will replace?",
        "If my {part} turns out to be defective, do I make the claim with your shop or with the manufacturer directly?",
        "The seat post clamp on my six-week-old {bike} snapped when I tightened it to the marked torque. Is that a defect the brand will stand behind?",
        "Is a rust spot inside the frame of a one-year-old bike a manufacturing problem? I'd like the maker to look at it.",
    ],
    "billing": [
        "There's a {amount} payment to your shops on my card statement that I don't recognise. Could you check what it was?",
        "My employer pays for bike upkeep but needs a tax invoice. Can you send an itemised bill for the {service} on my {bike}?",
        "The workshop estimate was lower than the {amount} I was asked to pay on collection. Could someone explain the extra?",
        "I cancelled a hire booking for {day} and the deposit still hasn't gone back onto my card. How long does that usually take?",
        "I paid in cash for {order} and can't find the receipt. Could you email me something that shows it was paid?",
        "Is it possible to pay the rest of {order} with a different card from the first payment?",
        "The card reader at {shop} gave an error when I paid for {service}. Was the money taken, or should I pay again?",
        "I paid {amount} at your online checkout, never got a confirmation, and my bank shows two pending payments.",
        "The labour on {order} seems to be listed twice. Who can correct the bill?",
        "My club discount wasn't taken off when I bought the {product}. Could you put the difference back on my card?",
        "Could you set us up with a monthly account for servicing our delivery bikes? We'd like one invoice at the end of each month instead of paying every time.",
        "Why does my statement from you show a late payment fee? I paid {order} the day it was due.",
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
    # A day's traffic for the demo tour's A/B split: routing messages in shapes the first routing
    # file does not have, none of them in any training file, so the split compares the versions
    # on mail that neither trained on (nor held out).
    traffic = make("routing", ROUTING_TRAFFIC, 21, per_label=48, name="routing-traffic",
                   exclude=routing)
    # The retrained routing adapter's second batch (see ROUTING_MORE): no message of the traffic.
    make("routing", ROUTING_MORE, 22, name="routing-more", exclude=routing | traffic)
