/*
 * ampoule.h: the C interface of ampoule-verify (ABI version 1).
 *
 * An app not written in Rust (Kotlin or Java through JNI, Swift, C++, C) checks and installs
 * signed model bundles through these calls. They wrap the library's safe update path only:
 * every check runs, and nothing here can switch one off.
 *
 * Calls in order:
 *   1. ampoule_abi_version()                   compare with AMPOULE_ABI_VERSION
 *   2. ampoule_store_open_with_trust_set()     or ..._with_pinned_keys(): the app's trust, its
 *                                              version and its policy document (FORMAT.md,
 *                                              "The policy document")
 *   3. ampoule_current()                       the release to load at start-up (checked in full)
 *   4. ampoule_update_begin(), _next(), ...    an update over the app's own HTTP, step by
 *      ampoule_session_free()                  step (see below); or ampoule_update(): the
 *                                              library's own HTTP(S) (builds with `fetch`); or
 *                                              ampoule_install_offline(): an update from a file
 *                                              made by `ampoule offline`; the outcome says what
 *                                              happened
 *   5. ampoule_release_field(), _label_count(), _label(), _metadata()
 *                                              the model's path, labels and manifest
 *   6. ampoule_rollback()                      when the app's own health check fails
 *   7. ampoule_release_free(), ampoule_store_free()
 * Beside them: ampoule_store_set_progress(), ampoule_device_id(), ampoule_switch_channel(),
 * ampoule_gc(), and for ampoule_update(): ampoule_store_set_transfer(), ampoule_update_cancel().
 *
 * Status and errors. Every call that can fail returns an int32_t status (AMPOULE_OK is 0) and
 * fills the ampoule_error the caller passes (which may be NULL when only the status is wanted):
 * the same code and a UTF-8 message with its length, also NUL-terminated. The error object
 * belongs to the caller, usually on its stack; the library never keeps a pointer to it, and
 * keeps no error state per thread, so a call may resume on another thread (Kotlin coroutines,
 * Swift tasks) and still read its own error.
 *
 * Memory. Inputs are pointers with explicit lengths in bytes; strings are UTF-8 without a
 * terminating NUL inside the length (a NUL inside it, invalid UTF-8, or a length over the
 * field's limit is refused with AMPOULE_INVALID_ARGUMENT). The library reads inputs only during
 * the call. Outputs are written into memory the caller owns: text into a buffer the caller
 * gives (buf, cap); *len always receives the full length, and AMPOULE_BUFFER_TOO_SMALL means
 * "call again with a buffer of *len bytes" (a NULL buffer with cap 0 asks for the length).
 * Text outputs are not NUL-terminated. Objects are handles (ampoule_store, ampoule_release):
 * numbers, not pointers, that the caller frees with the matching free call. A freed,
 * double-freed, made-up or other type's handle is refused with AMPOULE_INVALID_HANDLE; the
 * library looks handles up in a registry of live ones and never dereferences them.
 *
 * Threads. Every function may be called from any thread, at the same time as any other,
 * including on the same handle, unless its comment says otherwise. Two updates on one store
 * at once: the second fails at once with AMPOULE_LOCKED (and its outcome FAILED); reading
 * releases never waits for an update. Freeing a handle while another thread's call uses it is
 * safe: that call finishes, and later calls with the handle get AMPOULE_INVALID_HANDLE. An
 * ampoule_error or an output buffer must not be shared by two calls running at once.
 *
 * Panics. No Rust panic crosses this boundary: a caught one returns AMPOULE_PANIC (a bug; please
 * report it). The library must be built with panic = "unwind" (Rust's default) for that.
 *
 * ABI changes. AMPOULE_ABI_VERSION changes whenever an existing function's signature, a struct's
 * layout, or the meaning of an existing code changes (CHANGELOG.md lists what breaks the ABI).
 * New functions, new status codes, new outcome kinds and new field numbers do not change it:
 * treat an unknown status as an error, and an unknown outcome kind as FAILED.
 */
#ifndef AMPOULE_H
#define AMPOULE_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define AMPOULE_ABI_VERSION 1

/* Status codes. 1-8 are the interface's own; 10 and up are the library's error kinds (the
 * same names as the `kind` of the CLI's --json errors). */
#define AMPOULE_OK 0
#define AMPOULE_INVALID_ARGUMENT 1 /* a null pointer, non-UTF-8 text, a length that does not fit */
#define AMPOULE_INVALID_HANDLE 2   /* a freed, double-freed, made-up or other type's handle */
#define AMPOULE_BUFFER_TOO_SMALL 3 /* *len holds the length needed */
#define AMPOULE_POLICY_DOCUMENT 4  /* the policy document is refused; the message names the field */
#define AMPOULE_NEEDS_OTHER_APP 5  /* the offered release needs another app version */
#define AMPOULE_PANIC 6            /* an internal error (a bug), stopped at the boundary */
#define AMPOULE_NOT_FOUND 7        /* no such label index or metadata key */
#define AMPOULE_UNSUPPORTED 8      /* this build lacks the call's feature (ampoule_update: fetch) */
#define AMPOULE_IO 10
#define AMPOULE_MALFORMED 11
#define AMPOULE_TOO_LARGE 12
#define AMPOULE_SIGNATURE 13
#define AMPOULE_KEY 14
#define AMPOULE_DIGEST 15
#define AMPOULE_MANIFEST 16
#define AMPOULE_POLICY 17
#define AMPOULE_DESTINATION 18
#define AMPOULE_MODEL 19
#define AMPOULE_INCOMPATIBLE 20 /* the app's policy document refuses the model or labels */
#define AMPOULE_PROOF 21
#define AMPOULE_STORE 22
#define AMPOULE_LOCKED 23 /* another update runs on this store */
#define AMPOULE_TRUST_SET 24
#define AMPOULE_FEED 25
#define AMPOULE_STALE 26
#define AMPOULE_NETWORK 27
#define AMPOULE_SETTINGS 28
#define AMPOULE_CANCELLED 29
#define AMPOULE_CLOCK 30
#define AMPOULE_OTHER 99 /* an error kind newer than this ABI version */

/* Outcome kinds (ampoule_outcome.kind). */
#define AMPOULE_OUTCOME_INSTALLED 1       /* a newer release is current: load it */
#define AMPOULE_OUTCOME_UP_TO_DATE 2      /* nothing newer than what the store accepted */
#define AMPOULE_OUTCOME_NOT_IN_ROLLOUT 3  /* not this device's turn yet; see rollout_bucket */
#define AMPOULE_OUTCOME_NOTHING_OFFERED 4 /* the channel offers nothing; keep what runs */
#define AMPOULE_OUTCOME_NEEDS_OTHER_APP 5 /* status AMPOULE_NEEDS_OTHER_APP; message says why */
#define AMPOULE_OUTCOME_REFUSED 6         /* a check refused it; the status says which kind */
#define AMPOULE_OUTCOME_FAILED 7          /* could not finish (I/O, lock); try again later */

/* Release fields (ampoule_release_field). */
#define AMPOULE_FIELD_NAME 1            /* the bundle's name: trailcam-species */
#define AMPOULE_FIELD_VERSION 2         /* its SemVer version */
#define AMPOULE_FIELD_CREATED 3         /* RFC 3339 UTC time it was made */
#define AMPOULE_FIELD_REQUIRES_APP 4    /* the app versions it works with */
#define AMPOULE_FIELD_MANIFEST_SHA256 5 /* lowercase hex SHA-256 of the exact manifest */
#define AMPOULE_FIELD_MODEL_PATH 6      /* the model file to load */
#define AMPOULE_FIELD_LABELS_PATH 7     /* the label list file */
#define AMPOULE_FIELD_DIR 8             /* the release's directory */
#define AMPOULE_FIELD_MANIFEST_JSON 9   /* the verified manifest as JSON */
#define AMPOULE_FIELD_SIGNERS 10        /* key ids that signed, one per line */

/* The bytes an error message may use, its NUL included. */
#define AMPOULE_MESSAGE_BYTES 1024

/* The error object the caller owns. */
typedef struct ampoule_error {
    int32_t code;         /* the status the call returned */
    uint32_t message_len; /* bytes of message, UTF-8, without the NUL after them */
    uint8_t message[AMPOULE_MESSAGE_BYTES];
} ampoule_error;

/* A store: one app's store directory following one channel. 0 is no store. */
typedef struct ampoule_store {
    uint64_t id;
} ampoule_store;

/* A release in the store that passed every check. 0 is no release. */
typedef struct ampoule_release {
    uint64_t id;
} ampoule_release;

/* Keys pinned for one role: keys_len / 32 raw Ed25519 public keys (RFC 8032), of which
 * threshold must sign. */
typedef struct ampoule_role_keys {
    const uint8_t *keys;
    size_t keys_len;
    uint32_t threshold;
} ampoule_role_keys;

/* What an update did. */
typedef struct ampoule_outcome {
    int32_t kind;            /* AMPOULE_OUTCOME_* */
    uint32_t rollout_bucket; /* NOT_IN_ROLLOUT: 0 to 9999; it installs at bucket / 100 percent */
    ampoule_release installed; /* INSTALLED: the new current release; the caller frees it */
} ampoule_outcome;

/* The ABI version the library implements; refuse to run if it is not AMPOULE_ABI_VERSION.
 * Never fails. Concurrency: any thread, any time. */
uint32_t ampoule_abi_version(void);

/* A status code's name ("incompatible"), or "unknown": a static NUL-terminated string the
 * caller must not free. Never fails. Concurrency: any thread, any time. */
const char *ampoule_status_name(int32_t status);

/* Opens (or creates) the store in dir for the app, following channel. trust_set: the exact
 * trust-set file the app ships (the device then follows rotations published in the tree).
 * app_version: the app's SemVer version. policy: the app's policy document (JSON, FORMAT.md),
 * or NULL with length 0 for none. now_unix: the clock, in seconds since 1970. On success *out
 * is a store handle to free with ampoule_store_free. Errors: AMPOULE_INVALID_ARGUMENT,
 * AMPOULE_POLICY_DOCUMENT, AMPOULE_TRUST_SET or AMPOULE_SIGNATURE (an unusable trust set),
 * AMPOULE_SETTINGS (a channel name no feed can carry), AMPOULE_STORE, AMPOULE_IO.
 * Concurrency: any thread, with any call; several stores may be open at once, even on one
 * directory, and their updates exclude each other through the store's lock. */
int32_t ampoule_store_open_with_trust_set(const char *dir, size_t dir_len,
                                          const char *channel, size_t channel_len,
                                          const uint8_t *trust_set, size_t trust_set_len,
                                          const char *app_version, size_t app_version_len,
                                          const uint8_t *policy, size_t policy_len,
                                          int64_t now_unix, ampoule_store *out,
                                          ampoule_error *err);

/* As ampoule_store_open_with_trust_set, with keys pinned per role instead of a trust set:
 * bundle_keys sign bundles, feed_keys feeds, tree_head_keys the ledger's tree heads. A key
 * that holds two roles is passed for both. Pinned keys cannot rotate without an app update;
 * prefer the trust set. Also AMPOULE_KEY for a key that is not a usable Ed25519 key, or a
 * threshold outside 1 to the number of keys. Concurrency: as ampoule_store_open_with_trust_set. */
int32_t ampoule_store_open_with_pinned_keys(const char *dir, size_t dir_len,
                                            const char *channel, size_t channel_len,
                                            const ampoule_role_keys *bundle_keys,
                                            const ampoule_role_keys *feed_keys,
                                            const ampoule_role_keys *tree_head_keys,
                                            const char *app_version, size_t app_version_len,
                                            const uint8_t *policy, size_t policy_len,
                                            int64_t now_unix, ampoule_store *out,
                                            ampoule_error *err);

/* Frees a store handle. A second free of the same handle is AMPOULE_INVALID_HANDLE. A call
 * running on the store in another thread finishes first on its own reference. Concurrency:
 * any thread, with any call on the store. */
int32_t ampoule_store_free(ampoule_store store, ampoule_error *err);

/* Runs one update from an offline file (made by `ampoule offline`) at clock time now_unix:
 * every check of an online update but the feed's expiry. *out always receives the outcome
 * (out must not be NULL). The status is AMPOULE_OK for INSTALLED, UP_TO_DATE, NOT_IN_ROLLOUT
 * and NOTHING_OFFERED; AMPOULE_NEEDS_OTHER_APP; or the error kind of a refusal (REFUSED:
 * AMPOULE_DIGEST for a tampered bundle, AMPOULE_INCOMPATIBLE for one the policy refuses, ...)
 * or failure (FAILED: AMPOULE_LOCKED while another update runs, AMPOULE_IO, ...). The running
 * model is kept on every outcome but INSTALLED. Concurrent calls on one store: one runs, the
 * others get AMPOULE_LOCKED. */
int32_t ampoule_install_offline(ampoule_store store, const char *file, size_t file_len,
                                int64_t now_unix, ampoule_outcome *out, ampoule_error *err);

/* The current release, checked in full before the app loads it (manifest digest, signatures,
 * policy, every file's size and SHA-256: one read of the model). *out is a release handle to
 * free, or {0} before the first install. Concurrency: any thread, with any call, an update of
 * the same store included: it never waits for one, and sees the old or the new release. */
int32_t ampoule_current(ampoule_store store, ampoule_release *out, ampoule_error *err);

/* Makes the previous release current again (after the app's own health check failed on a new
 * model); it is checked in full first. *out is the release now current, a handle to free. The
 * release rolled back from stays refused. AMPOULE_POLICY when there is no previous release.
 * Concurrency: any thread; it takes the store's own lock, as an update does while it installs
 * and other rollbacks do (AMPOULE_LOCKED while one of them holds it). */
int32_t ampoule_rollback(ampoule_store store, ampoule_release *out, ampoule_error *err);

/* Frees a release handle. A second free is AMPOULE_INVALID_HANDLE. Concurrency: any thread;
 * reads of the release running in other threads finish first on their own reference. */
int32_t ampoule_release_free(ampoule_release release, ampoule_error *err);

/* One field of the release (AMPOULE_FIELD_*) as UTF-8 text, copied into buf (cap bytes);
 * *len receives its length. Concurrency (this and the three calls below): any thread, several
 * at once on the same release, each with its own buf, len and err. A release handle is a
 * snapshot: what it reads stays the same after an update or rollback, but its files on disk
 * stay only while it is the store's current or previous release. */
int32_t ampoule_release_field(ampoule_release release, int32_t field, uint8_t *buf, size_t cap,
                              size_t *len, ampoule_error *err);

/* The number of labels in the release's label list (in output-index order). */
int32_t ampoule_release_label_count(ampoule_release release, size_t *count, ampoule_error *err);

/* The label at index, copied into buf; AMPOULE_NOT_FOUND past the last one. */
int32_t ampoule_release_label(ampoule_release release, size_t index, uint8_t *buf, size_t cap,
                              size_t *len, ampoule_error *err);

/* The signed metadata's value at a dotted key ("preprocess.mean") as JSON text, copied into
 * buf; with key NULL and key_len 0, the whole metadata object ("{}" when there is none).
 * AMPOULE_NOT_FOUND for a key the metadata does not hold. */
int32_t ampoule_release_metadata(ampoule_release release, const char *key, size_t key_len,
                                 uint8_t *buf, size_t cap, size_t *len, ampoule_error *err);

/* Progress stages (the stage argument of an ampoule_progress_fn). */
#define AMPOULE_STAGE_HASH_PAYLOAD 1 /* hashing a format 1 bundle's payload before unpacking */
#define AMPOULE_STAGE_UNPACK 2       /* decompressing and checking the payload's files */
#define AMPOULE_STAGE_DOWNLOAD 3     /* the bundle arriving: ampoule_update's download, or the
                                      * copy out of an offline file */

/* A progress callback: done of total bytes of stage (AMPOULE_STAGE_*, or 0 for a stage newer
 * than this ABI version), with the context the app registered, untouched. */
typedef void (*ampoule_progress_fn)(void *context, int32_t stage, uint64_t done, uint64_t total);

/* Sets the store's progress callback, or clears it with progress NULL; it replaces any callback
 * set before. Updates of this store through this handle (offline, step by step, by URL) call it
 * from the thread doing the work: the caller's thread, a session's own thread, or a decoding
 * thread. The function must be callable from any thread with context, return quickly, and
 * stay valid until it is replaced, cleared or the store is freed; it may call this library,
 * but not wait for the update that calls it (nor drive the session that reports).
 * Concurrency: any thread, any time; an update running meanwhile switches to the new callback
 * at its next report. */
int32_t ampoule_store_set_progress(ampoule_store store, ampoule_progress_fn progress,
                                   void *context, ampoule_error *err);

/* The id that places this device in rollouts (made at random on the store's first use and kept
 * in it), copied into buf as ampoule_release_field copies. Concurrency: any thread, any time. */
int32_t ampoule_device_id(ampoule_store store, uint8_t *buf, size_t cap, size_t *len,
                          ampoule_error *err);

/* Makes the store follow the channel this handle was opened with, from now on. A store follows
 * the first channel it accepts a feed on; updates on another channel are refused
 * (AMPOULE_POLICY) until this call. The highest version the store accepted stays, so nothing
 * older installs from the new channel. Concurrency: any thread; it takes the store's own lock,
 * which an update holds only while it installs (AMPOULE_LOCKED then), so it may run between a
 * session's steps: switch channels when no update runs. */
int32_t ampoule_switch_channel(ampoule_store store, ampoule_error *err);

/* Removes releases other than the current and the previous one, what crashed updates left
 * behind, and downloads no update is using; *removed receives how many it removed. Every
 * update does this too. Concurrency: any thread; it takes the store's own lock, which an update
 * holds only while it installs (AMPOULE_LOCKED then); a session's download in progress is left
 * alone. */
int32_t ampoule_gc(ampoule_store store, size_t *removed, ampoule_error *err);

/*
 * The step-by-step update, for apps with their own HTTP stack. The app fetches the channel's
 * feed itself and starts a session on its bytes; the session then says what it needs next,
 * the app fetches it and hands it in, and so on until the step is DONE:
 *
 *   ampoule_update_begin(store, feed_url, feed bytes)  -> session
 *   loop: ampoule_update_next(session, &step)
 *     FETCH:    GET ampoule_update_url(session, 0), at most step.max_bytes;
 *               ampoule_update_provide(session, bytes)   (or ampoule_update_fail)
 *     DOWNLOAD: GET ampoule_update_url(session, i) for i < step.url_count, bytes step.offset
 *               to step.size - 1 (an HTTP Range request, also from offset 0: the step may
 *               ask for the bundle's head only);
 *               ampoule_update_write(session, piece) for each piece as it arrives, then
 *               ampoule_update_downloaded(session)     (or ampoule_update_fail)
 *     DONE:     step.outcome, with the same status as ampoule_install_offline's
 *   ampoule_session_free(session)
 *
 * Every check of the library's update runs, in the same order, whoever does the HTTP: the
 * bytes handed in are checked when the session takes its next step. A large bundle is asked
 * for twice (its head first, whose signed manifest is checked before the rest is fetched):
 * each time, append from step.offset. A download asked for again after a failed update
 * resumes: step.offset is what the store kept.
 *
 * Ownership. The session is a handle the caller frees with ampoule_session_free, also after
 * DONE. Bytes handed in are copied during the call. The download file belongs to the store:
 * the app never opens it; ampoule_update_write appends to it (opened without following a
 * link planted in the store's directory) and refuses to write past step.size.
 *
 * Threads. A session holds the store's update lock from ampoule_update_begin until it is
 * freed: meanwhile another session, ampoule_install_offline or ampoule_update on the same
 * store (from any handle or process) ends at once with AMPOULE_LOCKED, while ampoule_current
 * and release reads go on. ampoule_rollback, ampoule_switch_channel and ampoule_gc take the
 * store's own lock instead, which an update holds only while it installs. A session may be
 * driven from any thread (a coroutine that resumes elsewhere is fine); calls on one session
 * from two threads at once take turns. The library runs each session on a thread of its own,
 * which ampoule_session_free ends and waits for (when another thread's call still uses the
 * session, that call's return ends it).
 */

/* An update in progress, driven step by step. 0 is no session. */
typedef struct ampoule_session {
    uint64_t id;
} ampoule_session;

/* Step kinds (ampoule_step.kind). */
#define AMPOULE_STEP_FETCH 1    /* fetch a small document; hand it in with ampoule_update_provide */
#define AMPOULE_STEP_DOWNLOAD 2 /* download the bundle with ampoule_update_write */
#define AMPOULE_STEP_DONE 3     /* the update ended: step.outcome */

/* The bytes of a SHA-256 digest (FIPS 180-4). */
#define AMPOULE_SHA256_BYTES 32

/* What the update needs next, or how it ended. */
typedef struct ampoule_step {
    int32_t kind;       /* AMPOULE_STEP_* */
    uint32_t url_count; /* FETCH: 1; DOWNLOAD: the mirrors, in the order to try */
    uint64_t max_bytes; /* FETCH: the most bytes the document may have; stop reading there */
    uint64_t offset;    /* DOWNLOAD: bytes the file holds already; ask for the rest from here */
    uint64_t size;      /* DOWNLOAD: bytes the file holds when complete; never send more.
                         * A bundle larger than its head is asked for twice: up to the head's
                         * length first, then (offset = that length) up to the whole size */
    uint8_t sha256[AMPOULE_SHA256_BYTES]; /* DOWNLOAD: the whole file's SHA-256, as the signed
                                           * feed declares it (the session checks it) */
    ampoule_outcome outcome; /* DONE: as ampoule_install_offline's; INSTALLED's release is a
                              * handle the caller frees */
} ampoule_step;

/* Starts an update of store on the feed the app fetched from feed_url (the channel's feed,
 * feeds/<channel>.json in the release tree; other URLs are resolved against it), at clock time
 * now_unix. *out is a session handle to free with ampoule_session_free. The session takes the
 * store's update lock now: when another update holds it, the first step is DONE with FAILED
 * and AMPOULE_LOCKED. Errors: AMPOULE_INVALID_ARGUMENT, AMPOULE_INVALID_HANDLE, AMPOULE_IO.
 * Concurrency: any thread; see the threads paragraph above. */
int32_t ampoule_update_begin(ampoule_store store, const char *feed_url, size_t feed_url_len,
                             const uint8_t *feed, size_t feed_len, int64_t now_unix,
                             ampoule_session *out, ampoule_error *err);

/* Runs the update as far as it can go without the app and fills *step with what it needs
 * (status AMPOULE_OK) or how it ended (kind DONE; the status is the outcome's, as
 * ampoule_install_offline's: AMPOULE_OK, AMPOULE_NEEDS_OTHER_APP, or the kind of the refusal
 * or failure). A step not answered is asked again. After DONE it returns DONE with FAILED and
 * AMPOULE_SETTINGS. Concurrency: one call at a time per session (others wait their turn). */
int32_t ampoule_update_next(ampoule_session session, ampoule_step *step, ampoule_error *err);

/* The URL at index (0 to step.url_count - 1) of the last step, copied into buf as
 * ampoule_release_field copies; AMPOULE_NOT_FOUND past the last one, AMPOULE_INVALID_ARGUMENT
 * when the last step asks for no URL. Concurrency: as ampoule_update_next. */
int32_t ampoule_update_url(ampoule_session session, size_t index, uint8_t *buf, size_t cap,
                           size_t *len, ampoule_error *err);

/* Hands in the document a FETCH step asked for (copied); it is checked at the next
 * ampoule_update_next. AMPOULE_TOO_LARGE over step.max_bytes (nothing is kept: end the update
 * with ampoule_update_fail); AMPOULE_INVALID_ARGUMENT when the last step is not FETCH.
 * Concurrency: as ampoule_update_next. */
int32_t ampoule_update_provide(ampoule_session session, const uint8_t *bytes, size_t len,
                               ampoule_error *err);

/* Appends len bytes of the download a DOWNLOAD step asked for to the store's download file.
 * AMPOULE_TOO_LARGE when they would take the file past step.size (nothing is written);
 * AMPOULE_STORE when the file was replaced behind the session's back; AMPOULE_IO;
 * AMPOULE_INVALID_ARGUMENT when the last step is not DOWNLOAD. Concurrency: as
 * ampoule_update_next. */
int32_t ampoule_update_write(ampoule_session session, const uint8_t *bytes, size_t len,
                             ampoule_error *err);

/* Says the download of the last DOWNLOAD step is complete (the file holds step.size bytes); its
 * size and SHA-256 are checked at the next ampoule_update_next, before anything reads it.
 * AMPOULE_INVALID_ARGUMENT when the last step is not DOWNLOAD. Concurrency: as
 * ampoule_update_next. */
int32_t ampoule_update_downloaded(ampoule_session session, ampoule_error *err);

/* Ends the update because the app could not fetch what was asked; why (UTF-8, for the
 * message: an HTTP status, a timeout) is kept in the error. *out receives the outcome: FAILED
 * with AMPOULE_NETWORK; the running model stays, and a partial download stays for the next
 * update to resume. Concurrency: as ampoule_update_next. */
int32_t ampoule_update_fail(ampoule_session session, const char *why, size_t why_len,
                            ampoule_outcome *out, ampoule_error *err);

/* Frees a session handle, ending its update if it has not ended, and releases the store's
 * update lock (once no other thread's call still uses the session). A second free is
 * AMPOULE_INVALID_HANDLE. Concurrency: any thread. */
int32_t ampoule_session_free(ampoule_session session, ampoule_error *err);

/* Runs a whole update with the library's own HTTP(S) client: fetches the channel's feed at
 * feed_url (https:// or http://), whatever the session asks for, and the bundle (resuming a
 * partial download), with the limits ampoule_store_set_transfer set on this handle, or the
 * library's defaults (connect 20 s, each read 30 s, each request 1 h in all, at least 256
 * bytes/s over 60 s, 3 tries per source; HTTPS trusts the public web PKI roots built in).
 * ampoule_update_cancel, from another thread, stops it (AMPOULE_CANCELLED). *out receives the outcome and the status is
 * ampoule_install_offline's (AMPOULE_NETWORK for a transfer that failed). Only in libraries
 * built with the cargo feature `fetch`; others return AMPOULE_UNSUPPORTED (outcome FAILED), and
 * the app drives ampoule_update_begin with its own HTTP stack instead. Concurrency: any
 * thread; it takes the store's update lock as a session does (AMPOULE_LOCKED while another
 * update runs), and blocks the calling thread until the update ends. */
int32_t ampoule_update(ampoule_store store, const char *feed_url, size_t feed_url_len,
                       int64_t now_unix, ampoule_outcome *out, ampoule_error *err);

/* Limits of ampoule_update's transfers. A field left 0 keeps the library's default, given
 * beside it; a zeroed struct restores every default. A wait longer than 366 days (UINT64_MAX
 * for "no limit") is taken as 366 days. */
typedef struct ampoule_transfer {
    uint32_t connect_timeout_ms;     /* opening the TCP connection: 20000 */
    uint32_t read_timeout_ms;        /* the response head, then each piece of the body: 30000 */
    uint64_t total_timeout_ms;       /* one request in all, body included: 3600000 */
    uint64_t min_rate_bytes_per_sec; /* fewer bytes/s than this on average over */
    uint32_t rate_window_ms;         /* any window this long ends the transfer: 256 over 60000 */
    uint32_t attempts_per_source;    /* tries of one source while each makes progress: 3 */
} ampoule_transfer;

/* Sets the limits of the ampoule_update calls made through this store handle from now on (a
 * weak cellular link wants a long read timeout and few tries; a user waiting at a screen, a
 * short total). limits is copied; NULL is AMPOULE_INVALID_ARGUMENT. The step-by-step session
 * uses the app's own HTTP stack and its limits, not these. Concurrency: any thread, any time;
 * an ampoule_update already running keeps the limits it started with. */
int32_t ampoule_store_set_transfer(ampoule_store store, const ampoule_transfer *limits,
                                   ampoule_error *err);

/* Asks every ampoule_update running now through this store handle to stop. Each one stops
 * before its next request or between two pieces of a body, and returns AMPOULE_CANCELLED
 * (outcome FAILED): the running model stays, and what arrived of the bundle stays in the store
 * for the next update to resume. An update already installing finishes its install. It does
 * not reach updates through other handles, nor ones that start after this call. *running, when
 * running is not NULL, receives how many updates were asked (0: none was running).
 * Concurrency: any thread, any time, meant for a thread other than the update's (or its
 * progress callback). */
int32_t ampoule_update_cancel(ampoule_store store, size_t *running, ampoule_error *err);

#ifdef __cplusplus
}
#endif

#endif /* AMPOULE_H */
