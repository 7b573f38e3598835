// tenon: durable, atomic replacement of a file, and bounded whole-file reads.
//
// write_file_atomically(path, bytes) makes the new contents appear all at
// once or not at all: an exclusively created temporary file in the same
// directory, written and fsynced, renamed over <path>, then the directory
// fsynced. On an error the temporary file is removed and tenon::error
// (deploy.file.io) raised; nothing else is ever removed. Every operation
// goes through a `file_system` object, so tests inject failures at each
// step. The steps, their sources and other platforms: docs/design/model-file.md.
#pragma once

#include <algorithm>
#include <atomic>
#include <cerrno>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <fstream>
#include <limits>
#include <random>
#include <string>
#include <vector>

#if !defined(_WIN32)
#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>
#endif

#include "tenon/core/error.hpp"
#include "tenon/core/error_codes.hpp"

TENON_NAMESPACE_BEGIN

/// The file operations an atomic save needs. Each returns false on failure
/// (with errno, where there is one, left for the message).
class file_system {
public:
    virtual ~file_system() = default;
    /// Creates a new file for writing, readable by its owner alone (0600);
    /// fails (-1, errno EEXIST) when anything has that name, even a symlink,
    /// which is never followed. Returns a handle >= 0, or -1.
    virtual int create(const std::string& path) = 0;
    /// Writes all `size` bytes (retrying short writes).
    virtual bool write(int handle, const std::uint8_t* data, std::size_t size) = 0;
    virtual bool sync(int handle) = 0;
    virtual bool close(int handle) = 0;
    virtual bool rename(const std::string& from, const std::string& to) = 0;
    /// Makes the directory's entries durable.
    virtual bool sync_directory(const std::string& directory) = 0;
    virtual bool remove(const std::string& path) = 0;
    /// Gives the open file the permission bits of `target` (and, for root,
    /// its owner) when `target` exists, else 0666 less the umask.
    virtual bool set_permissions(int /*handle*/, const std::string& /*target*/) { return true; }
    /// A number that differs between processes (names temporary files).
    virtual std::uint64_t process_id() { return 0; }
    /// Unpredictable bits (names temporary files).
    virtual std::uint64_t random_bits() {
        std::random_device device;  // /dev/urandom on Linux with libstdc++ and libc++
        return (static_cast<std::uint64_t>(device()) << 32) ^ device();
    }
};

/// The host's file system.
class native_file_system : public file_system {
public:
#if !defined(_WIN32)
    int create(const std::string& path) override { return ::open(path.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_NOFOLLOW | O_CLOEXEC, 0600); }
    bool write(int handle, const std::uint8_t* data, std::size_t size) override {
        while (size > 0) {
            const ssize_t n = ::write(handle, data, size);
            if (n < 0) {
                if (errno == EINTR) continue;
                return false;
            }
            data += n;
            size -= static_cast<std::size_t>(n);
        }
        return true;
    }
    bool sync(int handle) override { return ::fsync(handle) == 0; }
    bool close(int handle) override { return ::close(handle) == 0; }
    bool rename(const std::string& from, const std::string& to) override { return ::rename(from.c_str(), to.c_str()) == 0; }
    bool sync_directory(const std::string& directory) override {
        const int fd = ::open(directory.c_str(), O_RDONLY | O_CLOEXEC);
        if (fd < 0) return false;
        const bool ok = ::fsync(fd) == 0;
        ::close(fd);
        return ok;
    }
    bool remove(const std::string& path) override { return ::unlink(path.c_str()) == 0; }
    bool set_permissions(int handle, const std::string& target) override { struct stat st { };
        if (::stat(target.c_str(), &st) != 0) return ::fchmod(handle, static_cast<mode_t>(0666 & ~process_umask())) == 0;
        // Root keeps the owner of the file it replaces; for anyone else
        // fchown would fail and the file becomes the saver's.
        if (::geteuid() == 0 && ::fchown(handle, st.st_uid, st.st_gid) != 0) return false;
        return ::fchmod(handle, st.st_mode & 07777) == 0;
    }
    std::uint64_t process_id() override { return static_cast<std::uint64_t>(::getpid()); }

    /// The process's umask, read from /proc/self/status on Linux (umask()
    /// itself cannot be read without being changed, which races with other
    /// threads creating files); 022, the common default, elsewhere. Reads
    /// into a fixed buffer: no allocation, nothing thrown.
    static unsigned process_umask() noexcept {
        const int fd = ::open("/proc/self/status", O_RDONLY | O_CLOEXEC);
        if (fd < 0) return 022;
        char text[4096];  // "Umask:" is the second line (proc(5))
        const ssize_t n = ::read(fd, text, sizeof(text) - 1);
        ::close(fd);
        if (n <= 0) return 022;
        text[n] = '\0';
        const char* at = std::strstr(text, "\nUmask:");
        if (!at) return 022;
        at += 7;
        while (*at == ' ' || *at == '\t') ++at;
        unsigned mask = 0;
        int digits = 0;
        for (; *at >= '0' && *at <= '7' && digits < 4; ++at, ++digits) mask = mask * 8u + static_cast<unsigned>(*at - '0');
        return digits > 0 ? (mask & 0777u) : 022u;
    }
#else
    int create(const std::string& path) override {
        for (int i = 0; i < max_open; ++i)
            if (!files_[i]) {
                files_[i] = std::fopen(path.c_str(), "wbx");  // C11 exclusive mode
                return files_[i] ? i : -1;
            }
        return -1;
    }
    bool write(int handle, const std::uint8_t* data, std::size_t size) override { return std::fwrite(data, 1, size, files_[handle]) == size; }
    bool sync(int handle) override { return std::fflush(files_[handle]) == 0; }
    bool close(int handle) override {
        const bool ok = std::fclose(files_[handle]) == 0;
        files_[handle] = nullptr;
        return ok;
    }
    bool rename(const std::string& from, const std::string& to) override {
        std::remove(to.c_str());  // not atomic on this platform
        return std::rename(from.c_str(), to.c_str()) == 0;
    }
    bool sync_directory(const std::string&) override { return true; }
    bool remove(const std::string& path) override { return std::remove(path.c_str()) == 0; }

private:
    static constexpr int max_open = 8;
    std::FILE* files_[max_open] = {};
#endif
};

namespace detail {

inline std::string directory_of(const std::string& path) {
    const auto slash = path.find_last_of('/');
    if (slash == std::string::npos) return ".";
    if (slash == 0) return "/";
    return path.substr(0, slash);
}

inline std::string errno_text() {
    const int e = errno;
    return e ? std::string(" (") + std::strerror(e) + ")" : std::string();
}

inline std::string name_of(const std::string& path) {
    const auto slash = path.find_last_of('/');
    return slash == std::string::npos ? path : path.substr(slash + 1);
}

}  // namespace detail

/// Creates the temporary file that will replace `path`:
/// "DIRECTORY/.NAME.tenon-PID-RANDOM.tmp" (RANDOM: 16 hex digits), created
/// by fs.create, so never through an existing name. Returns the handle and
/// sets `temporary`; returns -1 (errno set, EEXIST when every one of 16
/// names was taken) when no file could be created.
inline int create_temporary_file(const std::string& path, file_system& fs, std::string& temporary) {
    const std::string directory = detail::directory_of(path);
    const std::string prefix =
        (directory == "/" ? "/" : directory + "/") + "." + detail::name_of(path) + ".tenon-" + std::to_string(fs.process_id()) + "-";
    for (int attempt = 0; attempt < 16; ++attempt) {
        char hex[17];
        std::snprintf(hex, sizeof(hex), "%016llx", static_cast<unsigned long long>(fs.random_bits()));
        std::string candidate = prefix + hex + ".tmp";
        errno = 0;
        const int handle = fs.create(candidate);
        if (handle >= 0) {
            temporary.swap(candidate);  // allocates nothing once the file exists
            return handle;
        }
        if (errno != EEXIST) return -1;
    }
    errno = EEXIST;
    return -1;
}

/// Replaces `path` by `bytes` atomically and durably (see docs/design/model-file.md);
/// raises deploy.file.io naming the step that failed.
inline void write_file_atomically(const std::string& path, const std::vector<std::uint8_t>& bytes, file_system& fs) {
    std::string temporary;
    const int handle = create_temporary_file(path, fs, temporary);
    if (handle < 0)
        raise(codes::deploy_file_io,
              "saving '" + path + "': cannot create a temporary file in '" + detail::directory_of(path) + "'" + detail::errno_text() +
                  "; the previous file is unchanged");
    // From here to the rename nothing allocates before the temporary file is
    // removed, so even a std::bad_alloc leaves no file behind.
    const auto fail = [&](const char* step, bool close_it) {
        const int e = errno;
        if (close_it) fs.close(handle);
        fs.remove(temporary);
        errno = e;
        raise(codes::deploy_file_io,
              "saving '" + path + "': " + step + " of '" + temporary + "' failed" + detail::errno_text() + "; the previous file is unchanged");
    };
    errno = 0;
    if (!fs.write(handle, bytes.data(), bytes.size())) fail("writing", true);
    errno = 0;
    if (!fs.set_permissions(handle, path)) fail("setting the permissions", true);
    errno = 0;
    if (!fs.sync(handle)) fail("fsync", true);
    errno = 0;
    if (!fs.close(handle)) fail("closing", false);
    errno = 0;
    if (!fs.rename(temporary, path)) fail("renaming over the target", false);
    errno = 0;
    if (!fs.sync_directory(detail::directory_of(path))) {
        // The new file is in place; only its durability across a power loss is in doubt.
        raise(codes::deploy_file_io,
              "saving '" + path + "': fsync of the directory '" + detail::directory_of(path) + "' failed" + detail::errno_text() +
                  "; the new file is in place but may not survive a power loss");
    }
}

inline void write_file_atomically(const std::string& path, const std::vector<std::uint8_t>& bytes) {
    native_file_system fs;
    write_file_atomically(path, bytes, fs);
}

/// What a non-throwing read reports (detail::try_read_file_bounded,
/// try_load_model_file): ok, or the error code (from core/error_codes.hpp)
/// and the message the throwing call would have raised.
struct load_status {
    const char* code = nullptr;  // null: ok
    std::string message;
    load_status() = default;
    load_status(const char* c, std::string m) : code(c), message(std::move(m)) {}
    bool ok() const noexcept { return code == nullptr; }
};

namespace detail {
inline load_status try_read_file_bounded(const std::string& path, std::uint64_t max_bytes, std::vector<std::uint8_t>& bytes) {
#if !defined(_WIN32)
    // Checked before opening: a directory opens as a stream of "infinite"
    // size, and a FIFO without a writer would block.
    struct stat st {};
    if (::stat(path.c_str(), &st) != 0) {
        const int e = errno;
        return load_status(codes::deploy_file_io, "cannot open '" + path + "' for reading (" + std::strerror(e) + ")");
    }
    if (!S_ISREG(st.st_mode))
        return load_status(codes::deploy_file_io,
                           "'" + path + "' is " + (S_ISDIR(st.st_mode) ? "a directory" : "not a regular file (a FIFO, device or socket)") +
                               ", not a file to read");
#endif
    errno = 0;
    std::ifstream in(path, std::ios::binary);
    if (!in) return load_status(codes::deploy_file_io, "cannot open '" + path + "' for reading" + detail::errno_text());
    in.seekg(0, std::ios::end);
    const std::streamoff end = in.tellg();
    if (end < 0) return load_status(codes::deploy_file_io, "cannot determine the size of '" + path + "'");
    const auto size = static_cast<std::uint64_t>(end);
    if (size > max_bytes || size > std::numeric_limits<std::size_t>::max())
        return load_status(codes::deploy_model_oversize,
                           "'" + path + "' has " + std::to_string(size) + " bytes, more than the limit of " +
                               std::to_string(std::min<std::uint64_t>(max_bytes, std::numeric_limits<std::size_t>::max())));
    in.seekg(0, std::ios::beg);
    bytes.assign(static_cast<std::size_t>(size), 0);
    if (size > 0 && !in.read(reinterpret_cast<char*>(bytes.data()), static_cast<std::streamsize>(size)))
        return load_status(codes::deploy_file_io, "reading '" + path + "' failed after " + std::to_string(in.gcount()) + " bytes");
    return {};
}
}  // namespace detail

/// Reads a whole file of at most `max_bytes` bytes; raises deploy.file.io
/// when it cannot be read and deploy.model.oversize when it is larger (the
/// size is checked before any buffer is allocated).
inline std::vector<std::uint8_t> read_file_bounded(const std::string& path, std::uint64_t max_bytes) {
    std::vector<std::uint8_t> bytes;
    const load_status st = detail::try_read_file_bounded(path, max_bytes, bytes);
    if (!st.ok()) raise(st.code, st.message);
    return bytes;
}

TENON_NAMESPACE_END
