package jet

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// Value is a key's latest entry as read from the stream leader.
type Value struct {
	// Data is the value; nil when the key does not exist or was deleted.
	Data []byte
	// Revision is the stream sequence of the key's latest entry (a value
	// or a delete marker); 0 when the key was never written (or purged
	// from the stream).
	Revision uint64
	// Found reports whether Data holds a value (not a delete marker).
	Found bool
}

// msgGetResponse is the JetStream API's answer to a message get.
type msgGetResponse struct {
	Error *struct {
		Code        int    `json:"code"`
		ErrCode     int    `json:"err_code"`
		Description string `json:"description"`
	} `json:"error"`
	Message *struct {
		Subject string `json:"subject"`
		Seq     uint64 `json:"seq"`
		Header  []byte `json:"hdrs"`
		Data    []byte `json:"data"`
	} `json:"message"`
}

// errCodeNoMessage is JetStream's error code for "no message found".
const errCodeNoMessage = 10037

// Latest reads key's latest entry in KV bucket from the bucket stream's
// leader. A key-value Get may be answered by any replica (direct get),
// and a follower can lag a write that its leader has confirmed: a worker
// taking over a partition that read a snapshot there would restore an
// older state than the one its predecessor wrote just before releasing the
// lease. Reads that must see every confirmed write use Latest.
func Latest(ctx context.Context, js jetstream.JetStream, bucket, key string) (Value, error) {
	req, err := json.Marshal(map[string]string{"last_by_subj": "$KV." + bucket + "." + key})
	if err != nil {
		return Value{}, err
	}
	if _, ok := ctx.Deadline(); !ok {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, 5*time.Second)
		defer cancel()
	}
	subject := apiPrefix(js) + "STREAM.MSG.GET.KV_" + bucket
	msg, err := js.Conn().RequestWithContext(ctx, subject, req)
	if err != nil {
		return Value{}, fmt.Errorf("jet: read %s in %s: %w", key, bucket, err)
	}
	var resp msgGetResponse
	if err := json.Unmarshal(msg.Data, &resp); err != nil {
		return Value{}, fmt.Errorf("jet: read %s in %s: answer: %w", key, bucket, err)
	}
	if resp.Error != nil {
		if resp.Error.ErrCode == errCodeNoMessage {
			return Value{}, nil
		}
		return Value{}, fmt.Errorf("jet: read %s in %s: %s (code %d, error %d)", key, bucket,
			resp.Error.Description, resp.Error.Code, resp.Error.ErrCode)
	}
	if resp.Message == nil {
		return Value{}, fmt.Errorf("jet: read %s in %s: %w", key, bucket, jetstream.ErrInvalidJetStreamResponse)
	}
	v := Value{Revision: resp.Message.Seq}
	if len(resp.Message.Header) > 0 {
		h, err := nats.DecodeHeadersMsg(resp.Message.Header)
		if err != nil {
			return Value{}, fmt.Errorf("jet: read %s in %s: headers: %w", key, bucket, err)
		}
		if op := h.Get("KV-Operation"); op == "DEL" || op == "PURGE" {
			return v, nil
		}
	}
	v.Data, v.Found = resp.Message.Data, true
	if v.Data == nil {
		v.Data = []byte{}
	}
	return v, nil
}

// apiPrefix returns the subject prefix of js's API requests.
func apiPrefix(js jetstream.JetStream) string {
	o := js.Options()
	switch {
	case o.Domain != "":
		return "$JS." + o.Domain + ".API."
	case o.APIPrefix != "":
		if !strings.HasSuffix(o.APIPrefix, ".") {
			return o.APIPrefix + "."
		}
		return o.APIPrefix
	}
	return "$JS.API."
}
