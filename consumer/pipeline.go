package consumer

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/fhirmap"
)

// Pipeline consumes input messages from the durable JetStream consumer,
// records them and what they change through the Store, and relays the outbox
// to the output subjects. Several replicas may run against the same stream,
// consumer and database.
type Pipeline struct {
	nc      *nats.Conn
	js      jetstream.JetStream
	store   Store
	codes   *fhirmap.CodeTable
	planner Planner
	cfg     Config
	log     *slog.Logger
	metrics *Metrics
	now     func() time.Time
	// Workers is how many messages (or groups, with group commit) of a
	// fetched batch are processed at once; messages of one patient
	// serialise on the store's patient lock.
	workers int
	// groupMax and groupWait bound a group commit: at most groupMax
	// messages, committed groupWait after the group's first message at the
	// latest (sooner when the fetched batch ends).
	groupMax  int
	groupWait time.Duration
	// gasFirst: a blood gas ends its group and goes ahead in its lane
	// (lane; Options.PlainGroups turns it off).
	gasFirst bool

	relayKick chan struct{}

	mu       sync.Mutex
	consumer jetstream.Consumer
	// fresh is the fresh lane's consumer (nil until created, or after it
	// was deleted), freshActive whether it exists and its last pull did
	// not fail, mainSeq the highest stream sequence the main consumer
	// delivered to this replica and started when Run began (fresh.go).
	fresh       jetstream.Consumer
	freshActive atomic.Bool
	mainSeq     atomic.Uint64
	started     time.Time
	active      atomic.Bool  // the consumer exists and the last fetch did not fail
	progress    atomic.Int64 // messages settled for good (acked or terminated)
	// dlFailingSince is when the dead-letter path (copy or record) began
	// to fail, in Unix nanoseconds; 0 while it works.
	dlFailingSince atomic.Int64
	// relayFailSince is when the outbox relay began to fail (Unix
	// nanoseconds, 0 while it works) and relayErr its last error.
	relayFailSince atomic.Int64
	relayErr       atomic.Value // string
	// relayMu serialises relayAll: the relay loop and the final flush of
	// Run (which begins only after the loop has stopped) must never run
	// passes at once, and it guards damaged and damageLogged.
	relayMu sync.Mutex
	// damaged holds the outbox rows whose stored payload the relay found
	// damaged (seq to reason), as of its last complete pass.
	// damageLogged are the rows already logged (once per row while the
	// process runs), outboxDamage the readiness text ("" when none).
	damaged      map[int64]string
	damageLogged map[int64]bool
	outboxDamage atomic.Value // string
	// stalledSince is when the watchdog found pending input without
	// progress (Unix nanoseconds, 0 when intake moves), stalledPending how
	// much was pending then.
	stalledSince    atomic.Int64
	stalledPending  atomic.Uint64
	stalledProgress atomic.Int64 // progress when the stall was found

	// hooks lets tests inject faults at named points; nil in production.
	hooks *Hooks
}

// Hooks are fault-injection points for tests. A hook returning an error
// makes the pipeline behave as if the process died at that point: the
// message is neither acked nor naked.
type Hooks struct {
	AfterCommit  func(streamSeq uint64) error // after the store committed, before the ack
	AfterPublish func(seq int64) error        // after the output PubAck, before the outbox row is marked
	BeforeIngest func(streamSeq uint64)       // e.g. to slow a handler down
	BeforeDecode func(streamSeq uint64)       // e.g. to slow one message's decode down
	DuringPlan   func(patient string)         // inside the ingest transaction, under the patient lock
}

// Options configures a Pipeline.
type Options struct {
	Config Config
	Site   fhirmap.Site
	Codes  *fhirmap.CodeTable
	// AliasDigest is the hex SHA-256 of the code alias file Codes was
	// extended with, "" for none: part of the settings snapshot.
	AliasDigest string
	Logger      *slog.Logger
	Metrics     *Metrics
	// Workers bounds concurrent message handling per replica; default 4.
	// With a BatchStore it is the number of lanes: messages are dealt to a
	// lane by patient, and each lane commits its messages in groups, one
	// group at a time.
	Workers int
	// GroupMax is the most messages one group commit records, when the
	// Store implements BatchStore; default 64. 1 turns group commit off.
	GroupMax int
	// GroupWait is how long a group waits for more messages after its first
	// one before it is committed; default 5 ms. A group is also committed
	// when the fetched batch ends or GroupMax is reached, and as soon as a
	// blood gas joins it (see PlainGroups).
	GroupWait time.Duration
	// PlainGroups turns off the lanes' priority for blood gases (lane): a
	// gas then waits out its group's GroupWait and its place in the lane
	// like any message. For comparison only.
	PlainGroups bool
	Now         func() time.Time
	Hooks       *Hooks
}

// New builds a pipeline. It does not touch the network.
func New(nc *nats.Conn, store Store, o Options) (*Pipeline, error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("jetstream: %w", err)
	}
	cfg := o.Config.withDefaults()
	if o.Codes == nil {
		o.Codes = fhirmap.DefaultCodes()
	}
	if o.Site.CodeSystemURL != "" {
		// An airway Observation may send the service's own airway-model
		// codes, under the site's CodeSystem URL.
		o.Codes = o.Codes.WithCodeSystemURL(o.Site.CodeSystemURL)
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Metrics == nil {
		o.Metrics = NewMetrics(nil)
	}
	if o.Workers <= 0 {
		o.Workers = 4
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.GroupMax <= 0 {
		o.GroupMax = 64
	}
	if o.GroupWait <= 0 {
		o.GroupWait = 5 * time.Millisecond
	}
	site := o.Site
	site.Window = cfg.Window
	site.TemperatureWindow = cfg.TemperatureWindow
	return &Pipeline{
		nc:        nc,
		js:        js,
		store:     store,
		codes:     o.Codes,
		planner:   Planner{Site: site, ObservationSub: cfg.ObservationSub, ProvenanceSub: cfg.ProvenanceSub, AliasDigest: o.AliasDigest},
		cfg:       cfg,
		log:       o.Logger,
		metrics:   o.Metrics,
		now:       o.Now,
		workers:   o.Workers,
		groupMax:  o.GroupMax,
		groupWait: o.GroupWait,
		gasFirst:  !o.PlainGroups,
		relayKick: make(chan struct{}, 1),
		hooks:     o.Hooks,
	}, nil
}

// withDefaults fills zero fields from DefaultConfig.
func (c Config) withDefaults() Config {
	d := DefaultConfig()
	orDefault(&c.InputStream, d.InputStream)
	orDefault(&c.Durable, d.Durable)
	orDefault(&c.ObservationSub, d.ObservationSub)
	orDefault(&c.ProvenanceSub, d.ProvenanceSub)
	orDefault(&c.DeadLetterSub, d.DeadLetterSub)
	orDefault(&c.Window, d.Window)
	orDefault(&c.TemperatureWindow, d.TemperatureWindow)
	orDefault(&c.Horizon, d.Horizon)
	orDefault(&c.AckWait, d.AckWait)
	orDefault(&c.MaxAckPending, d.MaxAckPending)
	orDefault(&c.Fetch, d.Fetch)
	orDefault(&c.RetryBase, d.RetryBase)
	orDefault(&c.RetryMax, d.RetryMax)
	orDefault(&c.MaxDeliver, d.MaxDeliver)
	orDefault(&c.RelayInterval, d.RelayInterval)
	orDefault(&c.StallAfter, d.StallAfter)
	orDefault(&c.FailingAfter, d.FailingAfter)
	orDefault(&c.FreshDurable, c.Durable+FreshSuffix)
	orDefault(&c.FreshAge, d.FreshAge)
	orDefault(&c.FreshLag, d.FreshLag)
	return c
}

// orDefault sets *v to def when *v is its type's zero value.
func orDefault[T comparable](v *T, def T) {
	var zero T
	if *v == zero {
		*v = def
	}
}

// Config returns the resolved configuration.
func (p *Pipeline) Config() Config { return p.cfg }

// Run consumes until ctx is cancelled, then finishes the messages in hand,
// publishes what they produced, and returns. The caller drains and closes
// the NATS connection and the store afterwards.
func (p *Pipeline) Run(ctx context.Context) error {
	if err := p.ensureConsumer(ctx); err != nil {
		return err
	}
	p.started = time.Now()
	relayCtx, stopRelay := context.WithCancel(context.WithoutCancel(ctx))
	var wg, relay sync.WaitGroup
	relay.Go(func() { p.relayLoop(relayCtx) })
	wg.Go(func() { p.watchdog(ctx) })
	var fresh sync.WaitGroup
	if p.cfg.FreshAge >= 0 {
		// The lane creates its consumer itself: a denied or slow create
		// must not hold the main consumer back.
		fresh.Go(func() { p.freshLoop(ctx) })
	}

	p.fetchLoop(ctx)
	fresh.Wait()
	p.setFreshActive(false)

	// Input is settled: stop the relay loop (the last commits may have
	// kicked it) and wait for it, then publish what the input produced
	// before stopping, bounded so that a dead NATS cannot hold shutdown
	// forever (the outbox keeps the rest for the next start). A pass the
	// loop had begun is cut short; rows it published and did not mark are
	// published again by the flush, which the stream drops as repeats.
	stopRelay()
	relay.Wait()
	flushCtx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 10*time.Second)
	p.relayAll(flushCtx)
	cancel()
	wg.Wait()
	p.active.Store(false)
	return nil
}

// ensureConsumer creates or updates the durable consumer. Several replicas
// doing this at once is fine: the config is identical.
func (p *Pipeline) ensureConsumer(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	c, err := p.js.CreateOrUpdateConsumer(ctx, p.cfg.InputStream, ConsumerConfig(p.cfg))
	if err != nil {
		return fmt.Errorf("create consumer %s on %s: %w", p.cfg.Durable, p.cfg.InputStream, err)
	}
	p.mu.Lock()
	p.consumer = c
	p.mu.Unlock()
	p.noteMain(c.CachedInfo().Delivered.Stream)
	p.active.Store(true)
	return nil
}

func (p *Pipeline) currentConsumer() jetstream.Consumer {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.consumer
}

// fetchLoop pulls small batches (Fetch, not Consume, so a replica never
// holds a large prefetched buffer that another replica could have taken).
// Without group commit it settles every message of a batch before pulling
// the next. With group commit the lanes outlive the batches: a
// batch is pulled as soon as the last one's messages are dealt to the
// lanes and the one before that is settled, so a replica holds at most two
// batches. Settling each batch before the next was pulled left
// the input waiting on the server while the slowest lane committed its last
// group: in the paced bench, a blood gas published then was received
// 50-100 ms late.
func (p *Pipeline) fetchLoop(ctx context.Context) {
	failures := 0
	// A message in hand is finished even when shutdown begins: drain, do
	// not abandon.
	work := context.WithoutCancel(ctx)
	ls := p.startLanes(work)
	var settling *sync.WaitGroup
	defer func() {
		if settling != nil {
			settling.Wait()
		}
		ls.close()
	}()
	for ctx.Err() == nil {
		batch, err := p.currentConsumer().Fetch(p.cfg.Fetch, jetstream.FetchMaxWait(time.Second))
		if err == nil {
			if ls == nil {
				p.process(work, batch.Messages())
			} else {
				dealt := ls.deal(batch.Messages())
				if settling != nil {
					settling.Wait()
				}
				settling = dealt
			}
			err = batch.Error()
		}
		switch {
		case err == nil, errors.Is(err, nats.ErrTimeout), errors.Is(err, context.DeadlineExceeded):
			failures = 0
			p.active.Store(true)
			continue
		case errors.Is(err, jetstream.ErrConsumerDeleted), errors.Is(err, jetstream.ErrConsumerNotFound):
			p.active.Store(false)
			p.log.Warn("consumer gone; recreating", "durable", p.cfg.Durable)
			if err := p.ensureConsumer(ctx); err != nil {
				p.log.Error("recreate consumer", "err", err)
			}
		default:
			if ctx.Err() != nil {
				return
			}
			p.active.Store(false)
			p.log.Warn("fetch failed", "err", err)
		}
		failures++
		sleep(ctx, backoff(p.cfg.RetryBase, p.cfg.RetryMax, failures))
	}
}

// process handles the messages of one fetched batch, one at a time in up
// to p.workers goroutines (no group commit), and returns when every one
// of them is settled (or abandoned by a simulated crash).
func (p *Pipeline) process(ctx context.Context, msgs <-chan jetstream.Msg) {
	sem := make(chan struct{}, p.workers)
	var wg sync.WaitGroup
	for msg := range msgs {
		sem <- struct{}{}
		wg.Go(func() {
			defer func() { <-sem }()
			p.handle(ctx, msg)
		})
	}
	wg.Wait()
}

// lanes are the group-commit lanes of a replica (startLanes).
type lanes struct {
	p  *Pipeline
	in []chan *inflight
	wg sync.WaitGroup
}

// startLanes starts p.workers lanes when the store commits groups, nil
// otherwise. Messages are dealt to a lane by patient so that concurrent
// transactions of this replica rarely wait for each other's patient
// locks, and each lane commits its messages in groups (lane).
func (p *Pipeline) startLanes(ctx context.Context) *lanes {
	bs, grouped := p.store.(BatchStore)
	if !grouped || p.groupMax <= 1 {
		return nil
	}
	l := &lanes{p: p}
	for range p.workers {
		in := make(chan *inflight, p.groupMax)
		l.in = append(l.in, in)
		l.wg.Go(func() { p.lane(ctx, bs, in) })
	}
	return l
}

// close ends the lanes once they have committed what they hold.
func (l *lanes) close() {
	if l == nil {
		return
	}
	for _, in := range l.in {
		close(in)
	}
	l.wg.Wait()
}

// deal decodes the messages of one fetched batch in p.workers decoders at
// once and deals them to the lanes in the order they arrived, behind what
// the lanes hold of the batch before. It returns when every message is
// dealt; the WaitGroup it returns is done when every
// one is settled (or abandoned by a simulated crash). A lone decoder took
// about 180 us a message of the bench's scenario, so a pull of 64 spent
// 11 ms decoding before its last message reached a lane (more than a
// group's wait). The dealer takes the decoded messages in the order they
// arrived, so that a lane sees a patient's messages in the order of the
// stream, as with one decoder: the stored state would not depend on it,
// but a blood gas dealt before the readings published ahead of it would be
// derived twice.
func (l *lanes) deal(msgs <-chan jetstream.Msg) *sync.WaitGroup {
	p := l.p
	settled := &sync.WaitGroup{}
	type decodeJob struct {
		msg jetstream.Msg
		out chan *inflight
	}
	jobs := make(chan decodeJob, p.workers)
	order := make(chan chan *inflight, p.groupMax)
	var decoders sync.WaitGroup
	for range p.workers {
		decoders.Go(func() {
			for j := range jobs {
				j.out <- p.receive(j.msg, true)
			}
		})
	}
	decoders.Go(func() {
		for out := range order {
			if it := <-out; it != nil {
				settled.Add(1)
				var once sync.Once
				stop := it.stop
				it.stop = func() { once.Do(func() { stop(); settled.Done() }) }
				l.in[laneOf(it, len(l.in))] <- it
			}
		}
	})
	for msg := range msgs {
		out := make(chan *inflight, 1)
		order <- out
		jobs <- decodeJob{msg: msg, out: out}
	}
	close(jobs)
	close(order)
	decoders.Wait()
	return settled
}

// laneOf picks a message's lane from its first patient (FNV-1a), or from
// its inbox key when it names none.
func laneOf(it *inflight, n int) int {
	key := it.m.InboxKey
	switch {
	case len(it.m.Facts) > 0:
		key = it.m.Facts[0].Patient
	case len(it.m.Resources) > 0 && it.m.Resources[0].Patient != "":
		key = it.m.Resources[0].Patient
	}
	h := uint32(2166136261)
	for i := 0; i < len(key); i++ {
		h = (h ^ uint32(key[i])) * 16777619
	}
	return int(h % uint32(n))
}

// lane commits the messages it receives in groups of up to groupMax, each
// group groupWait after its first message at the latest, one group at a
// time. Poison messages are settled on their own in arrival order.
//
// A message that carries a blood gas (a PaCO2 fact: the input whose
// derived values are waited for) ends its group: the group is committed as
// soon as the gas joins it, without waiting out groupWait for more
// messages, and the messages behind it go to the next group. And messages
// that arrived while a group was committing are taken in arrival order
// except that such a gas goes ahead of those that name none of its
// patients and none of its fact keys (gasFirst): a lane holds several
// patients, and a gas of one waited behind the hot messages of another
// (in the paced bench, the four other panel members of the gas before it,
// each with a snapshot of its own: 180-250 ms a group). One patient's
// messages keep their stream order; messages of different patients are in
// no order to keep (lanes already record them concurrently), and a group
// is recorded as its messages would be one by one in the group's order.
func (p *Pipeline) lane(ctx context.Context, bs BatchStore, in <-chan *inflight) {
	var group, queue []*inflight
	closed := false
	timer := time.NewTimer(p.groupWait)
	timer.Stop()
	defer timer.Stop()
	flush := func() {
		timer.Stop()
		if len(group) > 0 {
			p.commitGroup(ctx, bs, group)
			group = nil
		}
	}
	// add puts it in the group; true when it committed the group.
	add := func(it *inflight) bool {
		if it.reason != "" {
			p.poison(ctx, it.msg, it.m, it.reason, it.detail, it.log)
			it.stop()
			return false
		}
		group = append(group, it)
		if len(group) == 1 {
			timer.Reset(p.groupWait)
		}
		if len(group) >= p.groupMax || (p.gasFirst && carriesGas(it.m)) {
			flush()
			return true
		}
		return false
	}
	// take queues a received message, or notes that the lane is closed.
	take := func(it *inflight, ok bool) {
		if !ok {
			closed = true
			return
		}
		queue = append(queue, it)
	}
	for {
		if len(queue) == 0 {
			if closed {
				flush()
				return
			}
			select {
			case it, ok := <-in:
				take(it, ok)
			case <-timer.C:
				flush()
				continue
			}
		}
		// Take what else is waiting (what arrived during a commit).
		for !closed {
			select {
			case it, ok := <-in:
				take(it, ok)
				continue
			default:
			}
			break
		}
		if p.gasFirst {
			gasFirst(queue)
		}
		for len(queue) > 0 {
			it := queue[0]
			queue = queue[1:]
			if add(it) {
				break // a commit: look again at what arrived meanwhile
			}
		}
	}
}

// carriesGas reports a message with a blood gas (PaCO2) fact.
func carriesGas(m Message) bool {
	return slices.ContainsFunc(m.Facts, func(f fhirmap.Fact) bool { return f.Quantity == fhirmap.QPCO2 })
}

// gasFirst reorders q in place: every message that carries a blood gas
// and names no patient and no fact key of a message before it that stays
// behind moves ahead of those, the moved ones in their order; the others
// keep theirs. A poison message names nothing (it did not decode).
func gasFirst(q []*inflight) {
	if !slices.ContainsFunc(q, func(it *inflight) bool { return carriesGas(it.m) }) {
		return
	}
	var first, rest []*inflight
	behind := map[string]bool{}
	for _, it := range q {
		if carriesGas(it.m) && !namesAny(it.m, behind) {
			first = append(first, it)
			continue
		}
		rest = append(rest, it)
		for _, pt := range patientsOf(it.m) {
			behind["p "+pt] = true
		}
		for _, f := range it.m.Facts {
			behind["k "+f.Key] = true
		}
	}
	copy(q, first)
	copy(q[len(first):], rest)
}

// namesAny reports whether m names a patient or fact key in set (as
// gasFirst keys them).
func namesAny(m Message, set map[string]bool) bool {
	for _, pt := range patientsOf(m) {
		if set["p "+pt] {
			return true
		}
	}
	for _, f := range m.Facts {
		if set["k "+f.Key] {
			return true
		}
	}
	return false
}

// commitGroup records a group in one transaction and settles each message
// after the COMMIT.
func (p *Pipeline) commitGroup(ctx context.Context, bs BatchStore, group []*inflight) {
	msgs := make([]Message, len(group))
	for i, it := range group {
		if p.hooks != nil && p.hooks.BeforeIngest != nil {
			p.hooks.BeforeIngest(it.meta.Sequence.Stream)
		}
		msgs[i] = it.m
	}
	results := bs.IngestBatch(ctx, msgs, p.planFunc(p.now().UTC()))
	if len(group) > 1 && len(results) == len(group) && errors.Is(results[0].Err, ErrLocked) {
		p.commitEach(ctx, group)
		return
	}
	outbox := 0
	for i, it := range group {
		if len(results) != len(group) {
			// A store bug must not lose messages: retry them later.
			p.finish(ctx, it, IngestResult{}, fmt.Errorf("ingest group: %d results for %d messages: %w", len(results), len(group), ErrTransient), false)
			continue
		}
		p.finish(ctx, it, results[i].IngestResult, results[i].Err, false)
		outbox += results[i].Outbox
	}
	if outbox > 0 {
		p.kickRelay()
	}
}

// commitEach records the messages of a group that failed on a lock one by
// one, so that only the messages of the locked patient wait: once a
// message fails on a lock, the later messages naming any of its patients
// are naked without another wait.
func (p *Pipeline) commitEach(ctx context.Context, group []*inflight) {
	p.metrics.LockFallbacks.Inc()
	p.log.Warn("group commit waited out a patient lock; recording its messages one by one", "messages", len(group))
	locked := map[string]bool{}
	for _, it := range group {
		pats := patientsOf(it.m)
		if slices.ContainsFunc(pats, func(pt string) bool { return locked[pt] }) {
			p.finish(ctx, it, IngestResult{}, fmt.Errorf("skipped after a locked patient: %w: %w", ErrTransient, ErrLocked), false)
			continue
		}
		res, err := p.store.Ingest(ctx, it.m, p.planFunc(p.now().UTC()))
		if errors.Is(err, ErrLocked) {
			for _, pt := range pats {
				locked[pt] = true
			}
		}
		p.finish(ctx, it, res, err, true)
	}
}

// patientsOf lists the patients a message names.
func patientsOf(m Message) []string {
	var out []string
	for _, f := range m.Facts {
		if !slices.Contains(out, f.Patient) {
			out = append(out, f.Patient)
		}
	}
	for _, r := range m.Resources {
		if r.Patient != "" && !slices.Contains(out, r.Patient) {
			out = append(out, r.Patient)
		}
	}
	return out
}

// inflight is one received message on its way through the pipeline.
type inflight struct {
	msg   jetstream.Msg
	meta  *jetstream.MsgMetadata
	m     Message
	log   *slog.Logger
	start time.Time
	stop  func() // stops the InProgress ticker
	// reason and detail are set for a message that did not decode.
	reason, detail string
}

// receive reads a message's metadata, starts its InProgress ticker and
// decodes it. It returns nil for a message it cannot settle. main says
// whether the main consumer delivered it.
func (p *Pipeline) receive(msg jetstream.Msg, main bool) *inflight {
	start := p.now()
	meta, err := msg.Metadata()
	if err != nil {
		// Not a JetStream message: nothing to settle against.
		p.log.Error("message without metadata", "err", err)
		return nil
	}
	if main {
		p.noteMain(meta.Sequence.Stream)
		if meta.NumDelivered > 1 {
			p.metrics.Redeliveries.Inc()
		}
	}
	if p.hooks != nil && p.hooks.BeforeDecode != nil {
		p.hooks.BeforeDecode(meta.Sequence.Stream)
	}
	it := &inflight{msg: msg, meta: meta, start: start}
	// Work that may outlast AckWait tells the server it is alive.
	it.stop = p.inProgress(msg)

	raw := msg.Data()
	sum := sha256.Sum256(raw)
	it.m = Message{
		InboxKey:   hex.EncodeToString(sum[:]),
		Subject:    msg.Subject(),
		StreamSeq:  meta.Sequence.Stream,
		Received:   start.UTC(),
		Raw:        raw,
		Window:     p.cfg.Window,
		TempWindow: p.cfg.TemperatureWindow,
		Horizon:    p.cfg.Horizon,
	}
	it.log = p.log.With("stream_seq", meta.Sequence.Stream, "delivery", meta.NumDelivered)

	decoded, err := fhirmap.Decode(raw, p.codes)
	if err != nil {
		it.reason, it.detail = decodeReason(err)
		return it
	}
	it.m.Resources, it.m.Facts = decoded.Resources, decoded.Facts
	for _, ig := range decoded.Ignored {
		p.metrics.Ignored.WithLabelValues(ig.Reason).Inc()
	}
	return it
}

// planFunc is the PlanFunc of one ingest, with the hook tests use.
func (p *Pipeline) planFunc(recorded time.Time) PlanFunc {
	return func(s Snapshot) (Changes, error) {
		if p.hooks != nil && p.hooks.DuringPlan != nil {
			p.hooks.DuringPlan(s.Patient)
		}
		return p.planner.Plan(s, recorded)
	}
}

// handle processes one message on its own and settles it exactly once.
func (p *Pipeline) handle(ctx context.Context, msg jetstream.Msg) {
	it := p.receive(msg, true)
	if it == nil {
		return
	}
	if it.reason != "" {
		p.poison(ctx, it.msg, it.m, it.reason, it.detail, it.log)
		it.stop()
		return
	}
	if p.hooks != nil && p.hooks.BeforeIngest != nil {
		p.hooks.BeforeIngest(it.meta.Sequence.Stream)
	}
	res, err := p.store.Ingest(ctx, it.m, p.planFunc(p.now().UTC()))
	p.finish(ctx, it, res, err, true)
}

// finish settles a message after its ingest: ack (after COMMIT, or for a
// duplicate), nak with delay (transient), or dead letter (refused by the
// store). kick says whether to wake the relay for this message's outbox rows.
func (p *Pipeline) finish(ctx context.Context, it *inflight, res IngestResult, err error, kick bool) {
	defer it.stop()
	msg, meta, log := it.msg, it.meta, it.log
	switch {
	case errors.Is(err, ErrDuplicate):
		p.metrics.Inputs.WithLabelValues("duplicate").Inc()
		p.ack(msg, log)
		return
	case errors.Is(err, ErrTransient), errors.Is(err, context.DeadlineExceeded), errors.Is(err, context.Canceled):
		p.metrics.Inputs.WithLabelValues("retry").Inc()
		delay := backoff(p.cfg.RetryBase, p.cfg.RetryMax, int(meta.NumDelivered))
		log.Warn("transient failure; retrying", "err", err, "delay", delay)
		p.settle(msg.NakWithDelay(delay), "nak", log)
		return
	case err != nil:
		// The store refused the content itself (a constraint): retrying
		// cannot help. Keep it as a dead letter for review.
		log.Error("store refused message", "err", err)
		p.poison(ctx, msg, it.m, "store-rejected", storeDetail(err), log)
		return
	}
	if p.hooks != nil && p.hooks.AfterCommit != nil {
		if err := p.hooks.AfterCommit(meta.Sequence.Stream); err != nil {
			return // simulated crash between COMMIT and ack
		}
	}
	p.ack(msg, log)
	p.metrics.Inputs.WithLabelValues("accepted").Inc()
	p.metrics.Latency.Observe(p.now().Sub(meta.Timestamp).Seconds())
	p.metrics.Handling.Observe(p.now().Sub(it.start).Seconds())
	for kind, n := range res.DerivedKinds {
		p.metrics.Derived.WithLabelValues(kind).Add(float64(n))
	}
	for reason, n := range res.RefusalReasons {
		p.metrics.Refusals.WithLabelValues(reason).Add(float64(n))
	}
	p.metrics.Retractions.Add(float64(res.Retractions))
	if kick && res.Outbox > 0 {
		p.kickRelay()
	}
}

// poison copies a message that can never succeed to the dead-letter
// subject, records it and terminates it. The copy is tried on a few
// deliveries (deadLetterCopyAttempts, with the bounded back-off); when it
// still cannot be published (a subject the permissions deny, no stream
// behind it) the record says so and the message is terminated all the
// same, so a poison message can never circle forever and fill the
// consumer's in-flight limit. Only a failure to record it, which a
// PostgreSQL outage causes, makes the message come back.
func (p *Pipeline) poison(ctx context.Context, msg jetstream.Msg, m Message, reason, detail string, log *slog.Logger) {
	reason, detail = boundText(reason, maxReasonBytes), boundText(detail, MaxDetailBytes)
	attempt := 1
	if meta, err := msg.Metadata(); err == nil {
		attempt = int(meta.NumDelivered)
	}
	if err := p.publishDeadLetter(ctx, m, reason, detail); err != nil {
		p.metrics.DeadLetterCopyFailures.Inc()
		if attempt < deadLetterCopyAttempts && !permanentPublishError(err) {
			p.deadLetterFailing(true)
			delay := backoff(p.cfg.RetryBase, p.cfg.RetryMax, attempt)
			log.Warn("publish dead letter failed; retrying", "err", err, "delay", delay)
			p.settle(msg.NakWithDelay(delay), "nak", log)
			return
		}
		log.Error("publish dead letter failed; recording and terminating without the copy", "err", err, "attempt", attempt)
		detail = boundText(detail+"; copy not published: "+err.Error(), MaxDetailBytes)
	}
	if err := p.store.DeadLetter(ctx, m, reason, detail); err != nil {
		p.deadLetterFailing(true)
		delay := backoff(p.cfg.RetryBase, p.cfg.RetryMax, attempt)
		log.Warn("record dead letter failed; retrying", "err", err, "delay", delay)
		p.settle(msg.NakWithDelay(delay), "nak", log)
		return
	}
	p.deadLetterFailing(false)
	log.Warn("dead letter", "reason", reason, "detail", detail)
	p.metrics.Inputs.WithLabelValues("dead-letter").Inc()
	p.metrics.DeadLetters.WithLabelValues(reason).Inc()
	p.settle(msg.TermWithReason(reason), "term", log)
}

// deadLetterCopyAttempts is how many deliveries of a poison message try to
// publish its dead-letter copy before it is recorded without one.
const deadLetterCopyAttempts = 3

// publishDeadLetter publishes the copy of a poison message, with bounded
// headers (JetStream refuses headers over 64 KB) and a deterministic
// message id, so that a retry is dropped as a duplicate.
func (p *Pipeline) publishDeadLetter(ctx context.Context, m Message, reason, detail string) error {
	dl := nats.NewMsg(p.cfg.DeadLetterSub)
	dl.Data = m.Raw
	dl.Header.Set(HeaderReason, reason)
	dl.Header.Set(HeaderDetail, detail)
	dl.Header.Set(HeaderStreamSeq, fmt.Sprint(m.StreamSeq))
	pctx, cancel := context.WithTimeout(ctx, publishTimeout)
	defer cancel()
	_, err := p.js.PublishMsg(pctx, dl, jetstream.WithMsgID("deadletter/"+m.InboxKey))
	if err != nil {
		return fmt.Errorf("publish %s: %w", p.cfg.DeadLetterSub, err)
	}
	return nil
}

// publishTimeout bounds one publish's wait for its PubAck. A publish the
// server's permissions deny gets no PubAck at all.
const publishTimeout = 5 * time.Second

// permanentPublishError reports publish errors that a retry cannot mend.
func permanentPublishError(err error) bool {
	return errors.Is(err, nats.ErrPermissionViolation) || errors.Is(err, nats.ErrMaxPayload) ||
		errors.Is(err, nats.ErrBadSubject) || errors.Is(err, nats.ErrHeadersNotSupported)
}

// MaxDetailBytes bounds the detail of a dead letter, stored and in its
// header; maxReasonBytes bounds its reason code.
const (
	MaxDetailBytes = 512
	maxReasonBytes = 64
)

// boundText makes s safe for a NATS header, a log line and the dead-letter
// table: printable ASCII only (anything else becomes '?', so no header
// can be split by a line break), cut to at most n bytes with "...".
func boundText(s string, n int) string {
	if len(s) > n {
		s = s[:n-3] + "..."
	}
	b := []byte(s)
	for i, c := range b {
		if c < 0x20 || c > 0x7e {
			b[i] = '?'
		}
	}
	return string(b)
}

// deadLetterFailing notes whether the dead-letter path just failed.
func (p *Pipeline) deadLetterFailing(failed bool) {
	if !failed {
		p.dlFailingSince.Store(0)
		p.metrics.DeadLetterFailing.Set(0)
		return
	}
	p.dlFailingSince.CompareAndSwap(0, p.now().UnixNano())
	p.metrics.DeadLetterFailing.Set(1)
}

func (p *Pipeline) ack(msg jetstream.Msg, log *slog.Logger) { p.settle(msg.Ack(), "ack", log) }

// settle notes a settled message. Only an ack or a term is progress for
// the watchdog and readiness: a message naked again and again (a store that
// refuses every write) is work pending, not work done.
func (p *Pipeline) settle(err error, what string, log *slog.Logger) {
	if what != "nak" {
		p.progress.Add(1)
	}
	if err != nil {
		// An unconfirmed settle means redelivery after AckWait, which the
		// inbox absorbs.
		log.Warn(what+" failed", "err", err)
	}
}

// inProgress sends InProgress at a third of AckWait until stopped.
func (p *Pipeline) inProgress(msg jetstream.Msg) (stop func()) {
	done := make(chan struct{})
	t := time.NewTicker(max(p.cfg.AckWait/3, 10*time.Millisecond))
	go func() {
		defer t.Stop()
		for {
			select {
			case <-done:
				return
			case <-t.C:
				_ = msg.InProgress()
			}
		}
	}()
	return func() { close(done) }
}

// decodeReason extracts the stable reason code and a payload-free detail:
// the entry, the field path and the decoder's sentence (which quotes at
// most a bounded unit, code or field name, e.g. the byte offset of a JSON
// syntax error).
func decodeReason(err error) (reason, detail string) {
	if de, ok := errors.AsType[*fhirmap.DecodeError](err); ok {
		var parts []string
		if de.Entry >= 0 {
			parts = append(parts, fmt.Sprintf("entry %d", de.Entry))
		}
		if de.Field != "" {
			parts = append(parts, de.Field)
		}
		if de.Detail != "" {
			parts = append(parts, de.Detail)
		}
		return de.Reason, boundText(strings.Join(parts, ": "), MaxDetailBytes)
	}
	return "malformed", "undecodable message"
}

// storeDetail keeps what is safe to record of a store error: the store
// reduces driver errors to SQLSTATE and constraint names (never the
// server's detail, which echoes values).
func storeDetail(err error) string { return boundText(err.Error(), 200) }

func (p *Pipeline) kickRelay() {
	select {
	case p.relayKick <- struct{}{}:
	default:
	}
}

// backoff is base*2^(attempt-1), capped at maxDelay.
func backoff(base, maxDelay time.Duration, attempt int) time.Duration {
	if attempt < 1 {
		attempt = 1
	}
	d := base
	for i := 1; i < attempt && d < maxDelay; i++ {
		d *= 2
	}
	return min(d, maxDelay)
}

func sleep(ctx context.Context, d time.Duration) {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
	case <-t.C:
	}
}
