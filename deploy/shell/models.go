package shell

import (
	"context"
	"errors"
	"fmt"
	"regexp"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// Guess models travel in a JetStream object store, one bucket per fleet and
// one object per version, so a robot fetches exactly the version a round
// start names and an old version stays there for robots still on it.

var bucketSafe = regexp.MustCompile(`[^A-Za-z0-9_-]`)

// ModelBucket is the object-store bucket of a fleet's guess models.
func ModelBucket(prefix, fleet string) string {
	return bucketSafe.ReplaceAllString(prefix+"_"+fleet+"_models", "_")
}

// ModelObject names version v in the bucket.
func ModelObject(v uint64) string { return fmt.Sprintf("guess-v%d", v) }

// ErrNoJetStream means the NATS server runs without JetStream.
var ErrNoJetStream = errors.New("the NATS server has no JetStream (start nats-server with -js, or use the coordinator's --embed-nats)")

// PublishModel stores data as version v of the fleet's guess model.
func PublishModel(ctx context.Context, nc *nats.Conn, bucket string, v uint64, data []byte) error {
	js, err := jetstream.New(nc)
	if err != nil {
		return err
	}
	store, err := js.CreateOrUpdateObjectStore(ctx, jetstream.ObjectStoreConfig{Bucket: bucket,
		Description: "Baton guess models, one object per version"})
	if err != nil {
		if noJetStream(err) {
			return ErrNoJetStream
		}
		return fmt.Errorf("model store %s: %w", bucket, err)
	}
	if _, err := store.PutBytes(ctx, ModelObject(v), data); err != nil {
		return fmt.Errorf("storing %s in %s: %w", ModelObject(v), bucket, err)
	}
	return nil
}

// FetchModel reads version v of the fleet's guess model.
func FetchModel(ctx context.Context, nc *nats.Conn, bucket string, v uint64) ([]byte, error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, err
	}
	store, err := js.ObjectStore(ctx, bucket)
	if err != nil {
		if noJetStream(err) {
			return nil, ErrNoJetStream
		}
		return nil, fmt.Errorf("model store %s: %w", bucket, err)
	}
	data, err := store.GetBytes(ctx, ModelObject(v))
	if err != nil {
		return nil, fmt.Errorf("fetching %s from %s: %w", ModelObject(v), bucket, err)
	}
	return data, nil
}

// noJetStream: a server without JetStream answers its API with nobody.
func noJetStream(err error) bool {
	return errors.Is(err, jetstream.ErrJetStreamNotEnabled) || errors.Is(err, jetstream.ErrJetStreamNotEnabledForAccount) ||
		errors.Is(err, nats.ErrNoResponders)
}
